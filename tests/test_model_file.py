"""The JSON model file: exact round trip, schema version, refusal of bad files."""

from __future__ import annotations

import copy
import json
import pickletools
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from ceiling.errors import InputFileError, ModelFileError
from ceiling.model import SCHEMA_VERSION, ModelSet, load_model, load_models


@pytest.fixture(scope="module")
def saved(demo_run, tmp_path_factory) -> tuple[ModelSet, Path, dict]:
    path = tmp_path_factory.mktemp("model") / "model.json"
    demo_run.models.save(path)
    return demo_run.models, path, json.loads(path.read_text(encoding="utf-8"))


def _points(model) -> pd.DataFrame:
    rng = np.random.default_rng(0)
    out = {}
    for f in model.factors:
        lo, hi = f.observed
        span = hi - lo
        # inside and outside the observed range, plus a NaN
        v = rng.uniform(lo - 0.2 * span, hi + 0.2 * span, 200)
        v[7] = np.nan
        out[f.factor] = v
    return pd.DataFrame(out)


def test_round_trip_predicts_identical_numbers(saved):
    models, path, _ = saved
    back = load_models(path)
    assert back.species == models.species
    for sp in models.species:
        m, b = models[sp], back[sp]
        pts = _points(m)
        c1, k1 = m.evaluate(pts)
        c2, k2 = b.evaluate(pts)
        assert np.array_equal(c1, c2, equal_nan=True)
        assert np.array_equal(k1, k2)
        assert np.array_equal(m.per_factor(pts), b.per_factor(pts), equal_nan=True)
        for f1, f2 in zip(m.factors, b.factors):
            assert np.array_equal(f1.params, f2.params)
            assert np.array_equal(f1.median_params, f2.median_params)
            assert f1.basis == f2.basis and f1.observed == f2.observed
            assert f1.diagnostics.to_dict() == f2.diagnostics.to_dict()
            assert np.array_equal(f1.conf_int, f2.conf_int, equal_nan=True)
    assert back.diagnostics_table().equals(models.diagnostics_table())


def test_load_model_picks_a_species(saved):
    models, path, _ = saved
    m = load_model(path, "sp_b")
    assert m.species == "sp_b" and m.factor_names == models["sp_b"].factor_names
    with pytest.raises(ModelFileError, match="holds 3 species"):
        load_model(path)
    with pytest.raises(ModelFileError, match="no species 'sp_z'"):
        load_model(path, "sp_z")


def test_file_is_plain_json_with_schema_version(saved):
    _, path, data = saved
    raw = path.read_bytes()
    assert data["schema_version"] == SCHEMA_VERSION and isinstance(data["schema_version"], int)
    assert data["kind"] == "ceiling-model"
    # json only: the text starts as a JSON object, holds no NaN/Infinity literals, and is not a
    # pickle stream (a pickle starts with the PROTO opcode 0x80 and cannot be parsed as JSON)
    assert raw.lstrip().startswith(b"{")
    assert raw[:1] != b"\x80"
    assert b"NaN" not in raw and b"Infinity" not in raw
    json.loads(raw.decode("utf-8"), parse_constant=lambda c: pytest.fail(f"non-JSON constant {c}"))
    with pytest.raises(ValueError, match="opcode"):  # the pickle parser finds no opcode in it
        list(pickletools.genops(raw))

    def only_json_types(v):
        if isinstance(v, dict):
            return all(isinstance(k, str) and only_json_types(x) for k, x in v.items())
        if isinstance(v, list):
            return all(only_json_types(x) for x in v)
        return v is None or isinstance(v, bool | int | float | str)

    assert only_json_types(data)


def _write(tmp_path: Path, data) -> Path:
    p = tmp_path / "edited.json"
    p.write_text(json.dumps(data), encoding="utf-8")
    return p


def _first_factor(d):
    return d["species"]["sp_a"]["factors"][0]


def test_missing_coefficient_is_refused(saved, tmp_path):
    _, _, data = saved
    d = copy.deepcopy(data)
    _first_factor(d)["coefficients"].pop()
    with pytest.raises(ModelFileError) as err:
        load_models(_write(tmp_path, d))
    msg = str(err.value)
    assert "'coefficients'" in msg and "ceiling fit" in msg and "tmax_warm" in msg


def test_non_number_coefficient_is_refused(saved, tmp_path):
    _, _, data = saved
    d = copy.deepcopy(data)
    _first_factor(d)["coefficients"][1] = None
    with pytest.raises(ModelFileError, match="'coefficients' holds a non-number.*ceiling fit"):
        load_models(_write(tmp_path, d))


@pytest.mark.parametrize(
    "field", ["coefficients", "observed_range", "basis", "diagnostics", "median_coefficients", "estimator"]
)
def test_missing_factor_field_is_refused(saved, tmp_path, field):
    _, _, data = saved
    d = copy.deepcopy(data)
    del _first_factor(d)[field]
    with pytest.raises(ModelFileError) as err:
        load_models(_write(tmp_path, d))
    msg = str(err.value)
    assert f"'{field}'" in msg and "is missing" in msg and "ceiling fit" in msg


@pytest.mark.parametrize("field", ["tau", "transform", "factors"])
def test_missing_species_field_is_refused(saved, tmp_path, field):
    _, _, data = saved
    d = copy.deepcopy(data)
    del d["species"]["sp_c"][field]
    with pytest.raises(ModelFileError, match=f"species 'sp_c'.*'{field}' is missing.*ceiling fit"):
        load_models(_write(tmp_path, d))


def test_missing_basis_field_is_refused(saved, tmp_path):
    _, _, data = saved
    d = copy.deepcopy(data)
    del _first_factor(d)["basis"]["scale"]
    with pytest.raises(ModelFileError, match="basis is missing field 'scale'.*ceiling fit"):
        load_models(_write(tmp_path, d))


def test_newer_schema_version_is_refused(saved, tmp_path):
    _, _, data = saved
    d = copy.deepcopy(data)
    d["schema_version"] = SCHEMA_VERSION + 1
    with pytest.raises(ModelFileError, match=r"schema version \d+ is newer.*upgrade ceiling"):
        load_models(_write(tmp_path, d))


@pytest.mark.parametrize("version", [0, -3, "1", 1.5, None, True])
def test_unknown_schema_version_is_refused(saved, tmp_path, version):
    _, _, data = saved
    d = copy.deepcopy(data)
    if version is None:
        del d["schema_version"]
    else:
        d["schema_version"] = version
    with pytest.raises(ModelFileError) as err:
        load_models(_write(tmp_path, d))
    msg = str(err.value)
    assert "schema" in msg and ("ceiling fit" in msg or "re-fit" in msg)


def test_other_json_is_refused(tmp_path):
    p = _write(tmp_path, {"hello": "world"})
    with pytest.raises(ModelFileError, match="not a ceiling model file.*ceiling fit"):
        load_models(p)
    p = _write(tmp_path, [1, 2, 3])
    with pytest.raises(ModelFileError, match="not a ceiling model file"):
        load_models(p)


@pytest.mark.parametrize(
    "content", [b"not json at all", b"\x80\x04\x95\x00\x00", b'{"kind": "ceiling-model",', b""],
    ids=["text", "pickle-bytes", "truncated", "empty"],
)
def test_not_json_is_refused(tmp_path, content):
    p = tmp_path / "model.json"
    p.write_bytes(content)
    with pytest.raises(ModelFileError, match="not valid JSON.*ceiling fit"):
        load_models(p)


def test_missing_model_file(tmp_path):
    with pytest.raises(InputFileError, match="model file not found.*ceiling fit"):
        load_models(tmp_path / "nope.json")


def test_bad_tau_in_file_is_refused(saved, tmp_path):
    _, _, data = saved
    d = copy.deepcopy(data)
    d["species"]["sp_a"]["tau"] = 0.3
    with pytest.raises(ModelFileError, match=r"'tau' must be a number in \(0.5, 1\)"):
        load_models(_write(tmp_path, d))


def test_repeated_factor_is_refused(saved, tmp_path):
    _, _, data = saved
    d = copy.deepcopy(data)
    fl = d["species"]["sp_a"]["factors"]
    fl.append(copy.deepcopy(fl[0]))
    with pytest.raises(ModelFileError, match="factor names repeat"):
        load_models(_write(tmp_path, d))


@pytest.mark.parametrize(("transform", "outside"), [("sqrt", "extend"), ("log1p", "hold")])
def test_round_trip_with_every_basis_and_estimator(tmp_path, transform, outside):
    from ceiling.model import FactorSpec, fit

    rng = np.random.default_rng(11)
    n = 300
    vals = pd.DataFrame({"a": rng.uniform(0, 10, n), "b": rng.uniform(-3, 3, n), "c": rng.uniform(5, 50, n)})
    cap = np.minimum(20 + 3 * vals["a"], 40 - 4 * vals["b"] ** 2)
    y = np.maximum(cap, 0) * rng.uniform(0, 1, n)

    class S:
        species = "x"
        abundance = y.to_numpy()
        values = vals
        dropped = {}

    specs = [FactorSpec("a", basis="linear"), FactorSpec("b", basis="spline", df=5),
             FactorSpec("c", basis="quadratic", estimator="binned", bins=8)]
    m = fit(S, specs, tau=0.9, transform=transform, outside=outside, wedge_replicates=4, seed=2)
    path = m.save(tmp_path / "m.json")
    back = load_model(path)
    pts = pd.DataFrame({"a": np.linspace(-5, 15, 50), "b": np.linspace(-6, 6, 50), "c": np.linspace(0, 60, 50)})
    assert np.array_equal(m.predict(pts), back.predict(pts))
    assert np.array_equal(m.limiting(pts), back.limiting(pts))
    assert [f.basis.name for f in back.factors] == ["linear", "spline", "quadratic"]
    assert back["c"].estimator == "binned" and back.transform == transform and back.outside == outside
