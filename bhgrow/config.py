"""Run configuration: TOML in, validated components out.

A config has one section per component; its keys are the fields of that component's frozen
dataclass, and the defaults are the dataclass defaults (each documented with unit and
source in the component's numpydoc "Parameters" section, which `bhgrow config` prints as
comments). Choices between components are one key each (``accretion.law``,
``feedback.mode``, ``seeding.channels``); every alternative keeps its own sub-table, so a
config can switch laws without losing parameters.

Errors name the file, the section and the key: unknown keys are rejected with a
did-you-mean suggestion, out-of-range values with the allowed range (from the component's
own validation).
"""

from __future__ import annotations

import dataclasses
import difflib
import re
import tomllib
from dataclasses import dataclass, fields, is_dataclass
from pathlib import Path

from . import _validate
from .errors import BhgrowInputError, ParameterError
from .physics import accretion as acc
from .physics import dynamics as dyn
from .physics import remnants as rem
from .physics import feedback as fb
from .physics import gas
from .physics import seeding as sd
from .physics.halo import HaloStructure
from .products import GWSettings
from .tables import Binning

# ------------------------------------------------------------------------------------------
# Run-level defaults (one place; unit and source beside each)
# ------------------------------------------------------------------------------------------
DEFAULT_SEED = 1                 # run seed: all random draws are keyed by (seed, object id)
DEFAULT_COSMOLOGY = "Planck18"   # astropy realization (Planck Collaboration 2020, A&A 641, A6)
DEFAULT_MAX_SUBSTEPS = 256       # cap on gas-hole substeps per snapshot interval
DEFAULT_SUBSTEP_DLNM = 0.5       # largest growth of ln(M_BH) per substep (only Bondi phases
                                 # approximate; bhgrow/physics/coupled.py): final BH masses
                                 # within 0.5% of a solve_ivp reference (tests)
DEFAULT_CHUNK_NODES = 2_000_000  # whole forests per engine chunk (bounds memory)
DEFAULT_HISTORIES = True         # write per-black-hole histories
DEFAULT_WORKERS = 1              # local worker processes (0 = one per CPU core)
DEFAULT_DASK_SCHEDULER = ""      # dask.distributed scheduler address ("" = no Dask)
DEFAULT_BARYON_TOLERANCE = 1e-6  # relative excess of gas+stars+BH over f_b M_halo allowed


@dataclass(frozen=True)
class RunSettings:
    """Settings of a run that are not physics.

    Parameters
    ----------
    seed : int
        Run seed (>= 0); every random draw is keyed by (seed, object id), so results do not
        depend on chunking or worker count.
    cosmology : str
        astropy cosmology realization name (default Planck18, Planck Collaboration 2020).
    max_substeps : int
        Maximum gas-and-black-hole substeps per snapshot interval (>= 1).
    substep_dlnm : float
        Largest growth of ln(M_BH) over one substep, in (0, 1]. Eddington-limited growth and
        the reservoir's own exchanges are solved exactly whatever the substep; only Bondi
        growth, whose hole mass is frozen at a mean in the gas drain, needs it.
    chunk_nodes : int
        Tree nodes per engine chunk of whole forests (>= 1); bounds memory.
    histories : bool
        Write per-black-hole histories (histories.h5).
    workers : int
        Local worker processes that run chunks in parallel (>= 0; 0 = one per CPU core,
        1 = run in this process). Results do not depend on it.
    dask_scheduler : str
        Address of a dask.distributed scheduler (e.g. ``tcp://10.0.0.5:8786``) to send chunks
        to instead of local processes; empty = no Dask. Needs ``pip install -e '.[dask]'``.
    """

    seed: int = DEFAULT_SEED
    cosmology: str = DEFAULT_COSMOLOGY
    max_substeps: int = DEFAULT_MAX_SUBSTEPS
    substep_dlnm: float = DEFAULT_SUBSTEP_DLNM
    chunk_nodes: int = DEFAULT_CHUNK_NODES
    histories: bool = DEFAULT_HISTORIES
    workers: int = DEFAULT_WORKERS
    dask_scheduler: str = DEFAULT_DASK_SCHEDULER

    def __post_init__(self):
        _validate.integer("run", "seed", self.seed, minimum=0)
        _validate.integer("run", "max_substeps", self.max_substeps, minimum=1)
        _validate.in_range("run", "substep_dlnm", self.substep_dlnm, 0.0, 1.0,
                           lo_open=True)
        _validate.integer("run", "chunk_nodes", self.chunk_nodes, minimum=1)
        _validate.integer("run", "workers", self.workers, minimum=0)
        if not isinstance(self.dask_scheduler, str):
            raise ParameterError(f"`dask_scheduler` of run must be an address string; got "
                                 f"{self.dask_scheduler!r}", source="run",
                                 rule="dask_scheduler")
        if not isinstance(self.histories, bool):
            raise ParameterError(f"`histories` of run must be true or false; got "
                                 f"{self.histories!r}", source="run", rule="histories")
        if not isinstance(self.cosmology, str):
            raise ParameterError(f"`cosmology` of run must be a name; got {self.cosmology!r}",
                                 source="run", rule="cosmology")


@dataclass(frozen=True)
class Model:
    """A named set of components, called by the engine in this explicit order.

    1. ``halo`` — halo properties of the snapshot's nodes;
    2. ``reionization`` — effective baryon fraction of inflowing gas;
    3. ``star_formation`` — closed-form reservoir step (inflow, stars, SN outflow, metals);
    4. ``gas_zone`` — zone density and sound speed;
    5. ``seeding`` — channels in list order; the first that fires seeds the halo;
    6. ``accretion`` (+ ``eddington``, ``efficiency``) — reservoir and hole solved together,
       piecewise in closed form (:mod:`bhgrow.physics.coupled`);
    7. ``feedback`` — reservoir gas removed by the accretion luminosity;
    8. ``spin`` — spin update at the end of the interval;
    9. ``clock`` — merger delay of a satellite's black hole (friction, hardening, GW);
    10. ``spin_draw`` and ``remnant`` — spins at coalescence, remnant mass, spin and kick.
    """

    halo: HaloStructure
    reionization: "gas.Reionization"
    star_formation: "gas.StarFormation"
    gas_zone: "gas.GasZone"
    seeding: tuple
    accretion: object
    eddington: "acc.EddingtonLimit"
    efficiency: "acc.RadiativeEfficiency"
    spin: "acc.SpinEvolution"
    feedback: object
    clock: "dyn.MergerClock"
    spin_draw: "rem.SpinDraw"
    remnant: "rem.RemnantModel"


@dataclass(frozen=True)
class Config:
    """A resolved configuration: run settings, model, products settings, resolved table."""

    run: RunSettings
    model: Model
    table: dict
    gw: object = None          # bhgrow.products.GWSettings
    binning: object = None     # bhgrow.tables.Binning


# section name -> (component class, documentation line)
_SINGLE = {
    "run": (RunSettings, "run settings (not physics)"),
    "halo": (HaloStructure, "halo structure: virial quantities, NFW concentration"),
    "reionization": (gas.Reionization, "suppression of baryon inflow after reionization"),
    "star_formation": (gas.StarFormation, "star formation, supernova outflow and metals"),
    "gas_zone": (gas.GasZone, "size, density and temperature of the accretion zone"),
    "eddington": (acc.EddingtonLimit, "Eddington cap"),
    "efficiency": (acc.RadiativeEfficiency, "radiative efficiency"),
    "spin": (acc.SpinEvolution, "black-hole spin evolution"),
    "mergers": (dyn.MergerClock, "merger delay: dynamical friction, hardening, GW inspiral"),
    "spin_draw": (rem.SpinDraw, "spin magnitudes and orientations at coalescence"),
    "remnant": (rem.RemnantModel, "numerical-relativity fits for the remnant"),
    "gw": (GWSettings, "gravitational-wave products (LISA SNR, detections)"),
    "tables": (Binning, "binning of the product tables"),
}
# choice sections: key naming the choice, registry, default choice
_CHOICE = {
    "accretion": ("law", acc.ACCRETION_LAWS, "bondi_hoyle", "accretion law"),
    "feedback": ("mode", fb.FEEDBACK_MODES, "energy", "AGN feedback coupling"),
}
# heavy before light (a pristine atomic-cooling halo under a strong LW flux collapses
# directly), halo-mass seeding last as the fallback for halos first resolved after the
# pristine era (coarse trees, cluster forests)
_SEEDING_DEFAULT = ("heavy", "light", "halo_mass")


# ------------------------------------------------------------------------------------------
def _suggest(key: str, allowed) -> str:
    close = difflib.get_close_matches(key, list(allowed), n=1, cutoff=0.6)
    return f" (did you mean `{close[0]}`?)" if close else ""


def _unknown_keys(table: dict, allowed, where: str, source: str) -> None:
    extra = [k for k in table if k not in allowed]
    if extra:
        k = extra[0]
        raise BhgrowInputError(
            f"{source}: [{where}] unknown key `{k}`{_suggest(k, allowed)}; allowed keys: "
            f"{', '.join(sorted(allowed))}", source=source, rule="unknown_key",
            rows=[f"{where}.{k}" for k in extra])


def _coerce(value, default):
    """TOML ints for float fields become floats, arrays for tuple fields become tuples;
    everything else is left to the component's validation."""
    if isinstance(default, float) and isinstance(value, int) and not isinstance(value, bool):
        return float(value)
    if isinstance(default, tuple) and isinstance(value, list):
        return tuple(value)
    return value


def build_component(cls, table: dict | None, where: str, source: str):
    """Instantiate a component dataclass from a (possibly partial) TOML table."""
    table = dict(table or {})
    if not isinstance(table, dict):
        raise BhgrowInputError(f"{source}: [{where}] must be a table", source=source,
                               rule="bad_section")
    flds = {f.name: f for f in fields(cls) if f.init and not f.name.startswith("_")}
    _unknown_keys(table, flds, where, source)
    kwargs = {}
    for name, value in table.items():
        f = flds[name]
        default = _field_default(f)
        if is_dataclass(default):
            if not isinstance(value, dict):
                raise BhgrowInputError(f"{source}: [{where}.{name}] must be a table; got "
                                       f"{value!r}", source=source, rule="bad_section")
            kwargs[name] = build_component(type(default), value, f"{where}.{name}", source)
        else:
            kwargs[name] = _coerce(value, default)
    try:
        return cls(**kwargs)
    except ParameterError as exc:
        raise BhgrowInputError(f"{source}: [{where}] {exc}", source=source, rule="bad_value",
                               rows=[where]) from None
    except (TypeError, ValueError) as exc:
        raise BhgrowInputError(f"{source}: [{where}] {exc}", source=source, rule="bad_value",
                               rows=[where]) from None


def _field_default(f):
    if f.default is not dataclasses.MISSING:
        return f.default
    if f.default_factory is not dataclasses.MISSING:  # type: ignore[misc]
        return f.default_factory()  # type: ignore[misc]
    return None


def from_table(table: dict, source: str = "<config>") -> Config:
    """Validate a config table (as parsed from TOML) and build the run settings and model."""
    allowed = set(_SINGLE) | set(_CHOICE) | {"seeding"}
    _unknown_keys(table, allowed, "top level", source)
    built = {}
    for name, (cls, _doc) in _SINGLE.items():
        built[name] = build_component(cls, table.get(name), name, source)
    for name, (key, registry, default, _doc) in _CHOICE.items():
        sec = dict(table.get(name) or {})
        _unknown_keys(sec, {key} | set(registry), name, source)
        choice = sec.get(key, default)
        if choice not in registry:
            raise BhgrowInputError(
                f"{source}: [{name}] `{key}` must be one of "
                f"{', '.join(map(repr, registry))}; got {choice!r}{_suggest(str(choice), registry)}",
                source=source, rule="bad_value", rows=[f"{name}.{key}"])
        # validate every alternative's table, build the chosen one
        comps = {k: build_component(cls, sec.get(k), f"{name}.{k}", source)
                 for k, cls in registry.items()}
        built[name] = comps[choice]
    sec = dict(table.get("seeding") or {})
    _unknown_keys(sec, {"channels"} | set(sd.SEEDING_CHANNELS), "seeding", source)
    chosen = sec.get("channels", list(_SEEDING_DEFAULT))
    if not isinstance(chosen, list) or not all(isinstance(c, str) for c in chosen):
        raise BhgrowInputError(f"{source}: [seeding] `channels` must be a list of names; got "
                               f"{chosen!r}", source=source, rule="bad_value")
    for c in chosen:
        if c not in sd.SEEDING_CHANNELS:
            raise BhgrowInputError(
                f"{source}: [seeding] unknown channel {c!r}{_suggest(c, sd.SEEDING_CHANNELS)}; "
                f"channels: {', '.join(sd.SEEDING_CHANNELS)}", source=source, rule="bad_value",
                rows=["seeding.channels"])
    if len(set(chosen)) != len(chosen):
        raise BhgrowInputError(f"{source}: [seeding] `channels` lists a channel twice: "
                               f"{chosen}", source=source, rule="bad_value")
    channels = {k: build_component(cls, sec.get(k), f"seeding.{k}", source)
                for k, cls in sd.SEEDING_CHANNELS.items()}
    model = Model(halo=built["halo"], reionization=built["reionization"],
                  star_formation=built["star_formation"], gas_zone=built["gas_zone"],
                  seeding=tuple((c, channels[c]) for c in chosen),
                  accretion=built["accretion"], eddington=built["eddington"],
                  efficiency=built["efficiency"], spin=built["spin"],
                  feedback=built["feedback"], clock=built["mergers"],
                  spin_draw=built["spin_draw"], remnant=built["remnant"])
    resolved = resolved_table(built["run"], model, channels, table)
    resolved["gw"] = _component_table(built["gw"])
    resolved["tables"] = _component_table(built["tables"])
    return Config(run=built["run"], model=model, table=resolved, gw=built["gw"],
                  binning=built["tables"])


def load_config(path=None) -> Config:
    """Read a TOML config (None = all defaults)."""
    if path is None:
        return from_table({}, "<defaults>")
    path = Path(path)
    source = str(path)
    if not path.exists():
        raise BhgrowInputError(f"{source}: no such config file", source=source, rule="no_file")
    try:
        table = tomllib.loads(path.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise BhgrowInputError(f"{source}: not valid TOML ({exc})", source=source,
                               rule="bad_toml") from None
    except OSError as exc:
        raise BhgrowInputError(f"{source}: cannot read ({exc})", source=source,
                               rule="no_file") from None
    return from_table(table, source)


# ------------------------------------------------------------------------------------------
def _component_table(obj) -> dict:
    out = {}
    for f in fields(obj):
        if not f.init or f.name.startswith("_"):
            continue
        v = getattr(obj, f.name)
        v = list(v) if isinstance(v, tuple) else v
        out[f.name] = _component_table(v) if is_dataclass(v) else v
    return out


def resolved_table(run: RunSettings, model: Model, channels: dict, raw: dict) -> dict:
    """The complete config (every key, defaults filled in) as a plain table."""
    t = {"run": _component_table(run)}
    for name in ("halo", "reionization", "star_formation", "gas_zone", "eddington",
                 "efficiency", "spin", "spin_draw", "remnant"):
        t[name] = _component_table(getattr(model, name))
    t["mergers"] = _component_table(model.clock)
    t["seeding"] = {"channels": [c for c, _ in model.seeding]}
    t["seeding"].update({k: _component_table(v) for k, v in channels.items()})
    for name, (key, registry, default, _doc) in _CHOICE.items():
        sec = dict(raw.get(name) or {})
        t[name] = {key: sec.get(key, default)}
        for k, cls in registry.items():
            t[name][k] = _component_table(build_component(cls, sec.get(k), f"{name}.{k}",
                                                          "<resolved>"))
    return t


# ------------------------------------------------------------------------------------------
_PARAM_RE = re.compile(r"^\s{4}(\w+)\s*:\s*(.*)$")


def field_docs(cls) -> dict:
    """First description line of each field from a numpydoc "Parameters" section."""
    doc = cls.__doc__ or ""
    lines = doc.splitlines()
    out = {}
    in_params = False
    for i, line in enumerate(lines):
        s = line.strip()
        if s == "Parameters" and i + 1 < len(lines) and lines[i + 1].strip().startswith("---"):
            in_params = True
            continue
        if in_params and s and i + 1 < len(lines) and lines[i + 1].strip().startswith("---") \
                and s != "Parameters":
            break
        if not in_params:
            continue
        m = _PARAM_RE.match(line)
        if m:
            names = [n.strip() for n in line.split(":")[0].split(",")]
            desc = []
            j = i + 1
            while j < len(lines) and lines[j].startswith(" " * 8):
                desc.append(lines[j].strip())
                j += 1
            text = " ".join(desc)
            for n in names:
                out[n] = text
    return out


def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, float):
        r = repr(v)
        return r if ("." in r or "e" in r or "inf" in r or "nan" in r) else r + ".0"
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if v is None:
        raise ValueError("TOML has no null")
    return str(v)


def _emit(lines: list, header: str, obj, doc: str) -> None:
    lines.append("")
    if doc:
        lines.append(f"# {doc}")
    lines.append(f"[{header}]")
    docs = field_docs(type(obj))
    nested = []
    for f in fields(obj):
        if not f.init or f.name.startswith("_"):
            continue
        v = getattr(obj, f.name)
        if is_dataclass(v):
            nested.append((f.name, v))
            continue
        if v is None:
            lines.append(f"# {f.name} = (unset)  # {docs.get(f.name, '')}".rstrip())
            continue
        comment = docs.get(f.name, "")
        for k, text in enumerate(_wrap(comment)):
            lines.append(f"# {text}")
        lines.append(f"{f.name} = {_toml_value(v)}")
    for name, v in nested:
        _emit(lines, f"{header}.{name}", v, docs.get(name, ""))


def _wrap(text: str, width: int = 92) -> list:
    import textwrap

    return textwrap.wrap(text, width) if text else []


def default_config_text() -> str:
    """The full default config as commented TOML (what `bhgrow config` prints)."""
    cfg = from_table({}, "<defaults>")
    lines = ["# bhgrow configuration (TOML). Every key is shown with its default; delete what",
             "# you do not change. Units are in the comments; sources are in the docs of each",
             "# component (bhgrow/physics/*.py)."]
    m = cfg.model
    _emit(lines, "run", cfg.run, _SINGLE["run"][1])
    for name in ("halo", "reionization", "star_formation", "gas_zone"):
        _emit(lines, name, getattr(m, name), _SINGLE[name][1])
    lines += ["", "# seeding channels, applied in list order; the first that fires seeds a halo",
              "[seeding]", f"channels = {_toml_value([c for c, _ in m.seeding])}"]
    for k, cls in sd.SEEDING_CHANNELS.items():
        _emit(lines, f"seeding.{k}", cls(), f"seeding channel {k!r}: "
              + (cls.__doc__ or "").strip().splitlines()[0])
    for name, (key, registry, default, doc) in _CHOICE.items():
        lines += ["", f"# {doc}: one of {', '.join(map(repr, registry))}", f"[{name}]",
                  f"{key} = {_toml_value(default)}"]
        for k, cls in registry.items():
            _emit(lines, f"{name}.{k}", cls(), (cls.__doc__ or "").strip().splitlines()[0])
    for name in ("eddington", "efficiency", "spin"):
        _emit(lines, name, getattr(m, name), _SINGLE[name][1])
    _emit(lines, "mergers", m.clock, _SINGLE["mergers"][1])
    for name in ("spin_draw", "remnant"):
        _emit(lines, name, getattr(m, name), _SINGLE[name][1])
    _emit(lines, "gw", cfg.gw, _SINGLE["gw"][1])
    _emit(lines, "tables", cfg.binning, _SINGLE["tables"][1])
    return "\n".join(lines) + "\n"


def write_toml(table: dict) -> str:
    """Serialize a resolved config table (nested dicts of scalars/lists) to TOML text."""
    lines: list[str] = []

    def walk(prefix: str, t: dict):
        scalars = {k: v for k, v in t.items() if not isinstance(v, dict)}
        tables = {k: v for k, v in t.items() if isinstance(v, dict)}
        if scalars or not tables:
            if prefix:
                lines.append(f"\n[{prefix}]")
            for k, v in scalars.items():
                if v is not None:
                    lines.append(f"{k} = {_toml_value(v)}")
        for k, v in tables.items():
            walk(f"{prefix}.{k}" if prefix else k, v)

    walk("", table)
    return "\n".join(lines).lstrip("\n") + "\n"
