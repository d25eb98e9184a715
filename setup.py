"""Build of bhgrow's one compiled extension (everything else is in pyproject.toml).

``bhgrow._ckernels`` (C, no dependencies but Python's headers) holds the engine's
compiled kernels (see ``bhgrow/_kernels.py``). It is optional: where it cannot be
built (no C compiler), the install goes on and the engine runs the array code it was
written from, with the same results to round-off.
"""

import sys

from setuptools import Extension, setup

# no fused multiply-add: a*b + c rounds twice, as in numpy (the kernels follow the array
# code's order of operations)
_ARGS = [] if sys.platform == "win32" else ["-ffp-contract=off"]

setup(ext_modules=[Extension("bhgrow._ckernels", ["bhgrow/_ckernels.c"],
                             extra_compile_args=_ARGS, optional=True)])
