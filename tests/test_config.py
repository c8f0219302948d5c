"""The run configuration: validation, suggestions for unknown keys, path resolution."""

from __future__ import annotations

from pathlib import Path

import pytest

from ceiling.config import load_config, parse_config
from ceiling.errors import CeilingError, ConfigError, InputFileError

REPO = Path(__file__).resolve().parents[1]


def _base(**fit) -> dict:
    return {
        "survey": {"path": "s.csv", "crs": "EPSG:4326"},
        "factors": [{"name": "t", "layer": "t.tif"}],
        "fit": fit,
    }


def test_demo_config_loads_with_paths_resolved_against_its_folder():
    cfg = load_config(REPO / "configs" / "demo.toml")
    assert cfg.name == "demo"
    assert cfg.factor_names == ["tmax_warm", "tmin_cold", "precip", "moisture"]
    assert cfg.survey.path.resolve() == (REPO / "demo_grids" / "survey.csv").resolve()
    assert cfg.factors[0].layer.resolve() == (REPO / "demo_grids" / "present" / "tmax_warm.tif").resolve()
    assert cfg.fit.tau == 0.95 and cfg.fit.seed == 1 and cfg.source == REPO / "configs" / "demo.toml"


def test_defaults():
    cfg = parse_config(_base())
    assert cfg.fit.tau == 0.95 and cfg.fit.transform == "none" and cfg.fit.outside == "hold"
    f = cfg.factors[0]
    # concave natural splines df 3 in a joint fit, screened only when two tests agree: the
    # defaults chosen on the virtual-species suite (BENCHMARKS.md, "Recovery")
    assert f.basis == "spline" and f.estimator == "quantile" and f.df == 3 and f.bins == 10
    assert cfg.fit.method == "joint" and cfg.fit.shape == "concave" and cfg.fit.screen and cfg.fit.edge_test == "both"
    assert cfg.survey.sampling == "nearest"


def test_relative_and_absolute_paths(tmp_path):
    absolute = (tmp_path / "elsewhere" / "layer.tif").as_posix()
    text = (
        '[survey]\npath = "data/s.csv"\ncrs = "EPSG:4326"\n\n'
        f'[[factors]]\nname = "a"\nlayer = "{absolute}"\n\n[[factors]]\nname = "b"\nlayer = "b.tif"\n'
    )
    (tmp_path / "run.toml").write_text(text)
    cfg = load_config(tmp_path / "run.toml")
    assert cfg.survey.path == tmp_path.resolve() / "data" / "s.csv"
    assert cfg.factors[0].layer == Path(absolute)
    assert cfg.factors[1].layer == tmp_path.resolve() / "b.tif"


@pytest.mark.parametrize("tau", [0.9, 0.95, 0.501, 0.999])
def test_tau_in_upper_half_is_accepted(tau):
    assert parse_config(_base(tau=tau)).fit.tau == tau


@pytest.mark.parametrize("tau", [0.5, 0.3, 1, 1.0, 0, -0.9, 1.2])
def test_tau_outside_upper_half_is_refused(tau):
    with pytest.raises(ConfigError, match=r"'fit.tau': tau must lie strictly between 0.5 and 1"):
        parse_config(_base(tau=tau))


@pytest.mark.parametrize(
    ("section", "key", "suggestion"),
    [
        ("fit", "tua", "tau"),
        ("fit", "wedge_replicate", "wedge_replicates"),
        ("fit", "sed", "seed"),
        ("survey", "abundnace", "abundance"),
        ("survey", "crss", "crs"),
        ("factors", "bsis", "basis"),
        ("factors", "estimater", "estimator"),
        ("top", "facotrs", "factors"),
    ],
)
def test_unknown_key_gets_a_suggestion(section, key, suggestion):
    d = _base()
    if section == "top":
        d[key] = []
    elif section == "factors":
        d["factors"][0][key] = 1
    else:
        d[section][key] = 1
    with pytest.raises(ConfigError) as err:
        parse_config(d, source="run.toml")
    msg = str(err.value)
    assert msg.startswith("run.toml: unknown key") and f"did you mean '{suggestion}'?" in msg


def test_unknown_key_without_close_match_lists_the_valid_keys():
    d = _base(zzzzzz=1)
    with pytest.raises(ConfigError, match="valid keys: tau, transform"):
        parse_config(d)


@pytest.mark.parametrize(
    ("edit", "words"),
    [
        (lambda d: d["survey"].pop("path"), ["required key 'survey.path' is missing", "add it"]),
        (lambda d: d.pop("factors"), ["required key 'factors' is missing"]),
        (lambda d: d.__setitem__("factors", []), ["'factors'", "at least 1"]),
        (lambda d: d["factors"][0].__setitem__("basis", "cubic"), ["'factors.0.basis'", "'linear'", "'cubic'"]),
        (lambda d: d["factors"][0].__setitem__("estimator", "max"), ["'factors.0.estimator'", "'binned'"]),
        (lambda d: d["factors"][0].__setitem__("name", "2 bad"), ["'factors.0.name'", "'2 bad'"]),
        (lambda d: d["factors"][0].__setitem__("df", 0), ["'factors.0.df'", "greater than or equal to 1"]),
        (lambda d: d["factors"][0].__setitem__("bins", 2), ["'factors.0.bins'", "3"]),
        (lambda d: d["fit"].__setitem__("transform", "log"), ["'fit.transform'", "'log1p'"]),
        (lambda d: d["fit"].__setitem__("outside", "clip"), ["'fit.outside'", "'hold'"]),
        (lambda d: d["survey"].__setitem__("sampling", "cubic"), ["'survey.sampling'", "'bilinear'"]),
        (lambda d: d["fit"].__setitem__("wedge_replicates", -1), ["'fit.wedge_replicates'"]),
        (lambda d: d["factors"][0].pop("layer"), ["factor 't' needs a source", "'layer'", "'column'"]),
        (lambda d: d["factors"].append({"name": "t", "column": "x"}), ["'t' is listed twice", "distinct name"]),
    ],
)
def test_bad_values_give_one_line_naming_the_field(edit, words):
    d = _base()
    edit(d)
    with pytest.raises(ConfigError) as err:
        parse_config(d, source="run.toml")
    msg = str(err.value)
    assert "\n" not in msg and msg.startswith("run.toml: ")
    for w in words:
        assert w in msg, (w, msg)


def test_missing_and_broken_files(tmp_path):
    with pytest.raises(InputFileError, match="config file not found") as err:
        load_config(tmp_path / "none.toml")
    assert isinstance(err.value, FileNotFoundError) and isinstance(err.value, CeilingError)
    bad = tmp_path / "bad.toml"
    bad.write_text('name = "x"\n[survey\n')
    with pytest.raises(ConfigError, match="not valid TOML.*line 2"):
        load_config(bad)
    binary = tmp_path / "bin.toml"
    binary.write_bytes(b"\xff\xfe\x00name")
    with pytest.raises(ConfigError):
        load_config(binary)


def test_config_error_is_a_value_error_with_one_line_text():
    err = ConfigError("first line\n   second   line")
    assert isinstance(err, ValueError) and str(err) == "first line second line"
