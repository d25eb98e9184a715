"""Importing bhgrow (and its command line) leaves the heavy libraries for first use.

Every ``bhgrow`` command starts by importing the package; scipy's interpolate, special and
integrate modules alone took ~0.5 s of a 1.4 s start-up before their imports moved into the
functions that use them. With several workers, ``bhgrow run`` builds the cosmology (which
needs them) while the other workers already check the trees, so the import no longer
delays the check. This test keeps it so: a structural check, not a timing.
"""

import json
import subprocess
import sys

# imported on first use only (figures, tables, cosmology tables, tree I/O, Dask)
DEFERRED = ("scipy", "matplotlib", "pandas", "h5py", "astropy.cosmology", "dask", "tqdm")


def test_import_defers_heavy_libraries():
    code = ("import json, sys; import bhgrow, bhgrow.cli, bhgrow.pipeline; "
            f"print(json.dumps(sorted(m for m in sys.modules if m.split('.')[0] in "
            f"{[d.split('.')[0] for d in DEFERRED]!r})))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True)
    loaded = json.loads(out.stdout)
    early = [m for m in loaded if any(m == d or m.startswith(d + ".") for d in DEFERRED)]
    assert early == [], f"imported by `import bhgrow`: {early}"
