"""Config: TOML loading, defaults, unknown keys, ranges, and the printed default config."""

from __future__ import annotations

import tomllib
from dataclasses import fields, is_dataclass

import pytest

from bhgrow.cli import main
from bhgrow.config import (default_config_text, field_docs, from_table, load_config,
                           write_toml)
from bhgrow.errors import BhgrowInputError


def test_defaults_build():
    cfg = load_config(None)
    assert [name for name, _ in cfg.model.seeding] == ["heavy", "light", "halo_mass"]
    assert cfg.run.seed == 1


def test_printed_default_config_is_valid_toml_and_equals_defaults():
    text = default_config_text()
    table = tomllib.loads(text)
    cfg = from_table(table, "printed")
    assert cfg.table == load_config(None).table


def _all_keys(obj, prefix=""):
    for f in fields(obj):
        if not f.init or f.name.startswith("_"):
            continue
        v = getattr(obj, f.name)
        if is_dataclass(v):
            yield from _all_keys(v, f"{prefix}{f.name}.")
        else:
            yield type(obj), f.name


def test_every_key_has_a_comment():
    cfg = load_config(None)
    from bhgrow.physics import accretion, feedback, seeding

    objs = [cfg.run, cfg.model.halo, cfg.model.reionization, cfg.model.star_formation,
            cfg.model.gas_zone, cfg.model.eddington, cfg.model.efficiency, cfg.model.spin,
            cfg.model.clock, cfg.model.spin_draw, cfg.model.remnant]
    objs += [c() for c in seeding.SEEDING_CHANNELS.values()]
    objs += [c() for c in accretion.ACCRETION_LAWS.values()]
    objs += [c() for c in feedback.FEEDBACK_MODES.values()]
    missing = [f"{cls.__name__}.{name}" for o in objs for cls, name in _all_keys(o)
               if not field_docs(cls).get(name)]
    assert not missing, f"undocumented config keys: {missing}"


def test_unknown_key_did_you_mean(tmp_path):
    p = tmp_path / "c.toml"
    p.write_text("[run]\nsed = 3\n")
    with pytest.raises(BhgrowInputError) as err:
        load_config(p)
    msg = str(err.value)
    assert str(p) in msg and "[run]" in msg and "`sed`" in msg and "did you mean `seed`" in msg


def test_unknown_section_and_channel(tmp_path):
    with pytest.raises(BhgrowInputError, match="did you mean `accretion`"):
        from_table({"acretion": {}}, "x.toml")
    with pytest.raises(BhgrowInputError, match="did you mean `heavy`"):
        from_table({"seeding": {"channels": ["hevy"]}}, "x.toml")
    with pytest.raises(BhgrowInputError, match="law"):
        from_table({"accretion": {"law": "bondy"}}, "x.toml")


def test_out_of_range_names_allowed_range():
    with pytest.raises(BhgrowInputError) as err:
        from_table({"run": {"substep_dlnm": 2.0}}, "x.toml")
    assert "[run]" in str(err.value) and "(0, 1]" in str(err.value)
    with pytest.raises(BhgrowInputError, match="boost"):
        from_table({"accretion": {"bondi_hoyle": {"boost": -3.0}}}, "x.toml")


def test_int_accepted_for_float_and_resolved_table_round_trip(tmp_path):
    cfg = from_table({"accretion": {"bondi_hoyle": {"boost": 10}}}, "x.toml")
    assert cfg.model.accretion.boost == 10.0
    text = write_toml(cfg.table)
    again = from_table(tomllib.loads(text), "again")
    assert again.table == cfg.table


def test_bad_toml_is_clean_error(tmp_path, capsys):
    p = tmp_path / "bad.toml"
    p.write_text("[run\nseed=")
    assert main(["run", str(p), "-o", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err
    assert "not valid TOML" in err and "Traceback" not in err
    assert not (tmp_path / "out").exists()


def test_cli_config_prints(capsys):
    assert main(["config"]) == 0
    out = capsys.readouterr().out
    assert "[accretion.bondi_hoyle]" in out and "[seeding.heavy]" in out
    tomllib.loads(out)
