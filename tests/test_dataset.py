"""Tests of infer.data: the HDF5 layout, the plain-text route, unit conversion, checks, writing.

Files are written here by hand (h5py, numpy, text) following the documented layout, so the reader is
checked against the specification, not only against our own writer. Spectra are invented smooth
shapes (demo only).
"""
from __future__ import annotations

import hashlib
import math
import os

import h5py
import numpy as np
import pytest

from infer import data as dataset
from infer.errors import UserError

GRID = np.arange(0, 131)                      # windows/ell: starts at 0 with zero weight at ℓ < 2
EDGES = [(10, 29), (30, 49), (50, 69), (70, 89)]
KINDS = ["TT"] * 4 + ["EE"] * 4


def toy_dl(ell):
    """Invented smooth D_ℓ in μK² (demo only)."""
    ell = np.asarray(ell, dtype=float)
    return 1500.0 + 800.0 * np.sin(ell / 17.0) + 0.05 * ell**2


def good_fields(units="Dl_uK2"):
    """A valid dataset in the declared units: smooth windows reaching beyond the band edges."""
    n = len(KINDS)
    lo = np.array([a for a, _ in EDGES] * 2)
    hi = np.array([b for _, b in EDGES] * 2)
    eff = 0.5 * (lo + hi) + 0.25
    window = np.zeros((n, GRID.size))
    for b in range(n):
        w = np.exp(-0.5 * ((GRID - eff[b]) / 9.0) ** 2)
        w[(GRID < 2) | (np.abs(GRID - eff[b]) > 30)] = 0.0      # compact support, beyond the band
        window[b] = w / w.sum()
    rng = np.random.default_rng(1)
    a = rng.normal(size=(n, n))
    cov = 0.1 * (a @ a.T) + np.eye(n)
    value = window @ toy_dl(GRID)
    if units == "Cl_K2":
        cl = np.zeros(GRID.size)
        cl[2:] = toy_dl(GRID[2:]) * 2 * math.pi / (GRID[2:] * (GRID[2:] + 1)) * 1e-12
        value = window @ cl
        cov = cov * 1e-24
    fields = {
        "bands/kind": np.array(KINDS, dtype="S2"),
        "bands/ell_lo": lo, "bands/ell_hi": hi, "bands/ell_eff": eff, "bands/value": value,
        "windows/ell": GRID.copy(), "windows/weight": window, "covariance": cov,
    }
    attrs = {"format": "infer-bandpowers", "format_version": 1, "experiment": "Toy",
             "units": units, "description": "hand-written test file"}
    return fields, attrs


def write_raw(path, fields, attrs):
    """Write a file in the documented layout with plain h5py (independent of dataset.write)."""
    with h5py.File(path, "w") as h5:
        for key, val in attrs.items():
            h5.attrs[key] = val
        for name, data in fields.items():
            h5.create_dataset(name, data=data)
    return path


# --------------------------------------------------------------------------------------- round trips

def assert_same(a, b, rtol=0.0):
    for name in ("ell_lo", "ell_hi", "window_ell"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name))
    np.testing.assert_array_equal(a.kind, b.kind)
    for name in ("ell_eff", "value", "covariance", "window", "to_dl"):
        np.testing.assert_allclose(getattr(a, name), getattr(b, name), rtol=rtol, atol=0.0)
    assert (a.units, a.experiment) == (b.units, b.experiment)


def test_hdf5_dl_reads_as_specified_and_round_trips(tmp_path):
    fields, attrs = good_fields()
    path = write_raw(tmp_path / "hand.h5", fields, attrs)
    bp = dataset.load(path)
    # Reference: hashlib's SHA-256 of the file bytes.
    assert bp.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    assert bp.spectra == ("TT", "EE") and len(bp) == 8 and bp.units == "Dl_uK2"
    np.testing.assert_array_equal(bp.value, fields["bands/value"])
    np.testing.assert_array_equal(bp.window, fields["windows/weight"])
    np.testing.assert_array_equal(bp.to_dl, np.ones(8))
    assert bp.ell_max_needed == 109
    assert not bp.value.flags.writeable

    out = tmp_path / "copy.hdf5"
    dataset.write(bp, out, description="copy")
    back = dataset.load(out)
    assert_same(bp, back)
    with h5py.File(out, "r") as h5:
        assert h5.attrs["format"] == "infer-bandpowers" and h5.attrs["format_version"] == 2
        assert h5.attrs["description"] == "copy"
        assert sorted(h5) == ["bands", "covariance", "windows"]


def test_hdf5_variable_length_string_kinds_and_float_edges(tmp_path):
    # Other writers may store kinds as variable-length UTF-8 strings and edges as integral floats.
    fields, attrs = good_fields()
    fields["bands/kind"] = np.array(KINDS, dtype=h5py.string_dtype("utf-8"))
    fields["bands/ell_lo"] = fields["bands/ell_lo"].astype(float)
    attrs["format_version"] = np.int32(1)
    bp = dataset.load(write_raw(tmp_path / "vlen.hdf5", fields, attrs))
    assert bp.spectra == ("TT", "EE") and bp.ell_lo.dtype.kind == "i"


def test_hdf5_cl_conversion_is_exact_and_round_trips(tmp_path):
    fields, attrs = good_fields("Cl_K2")
    path = write_raw(tmp_path / "cl.h5", fields, attrs)
    bp = dataset.load(path)
    ell = GRID.astype(float)
    cl_k2 = np.zeros(ell.size)
    cl_k2[2:] = toy_dl(ell[2:]) * 2 * math.pi / (ell[2:] * (ell[2:] + 1)) * 1e-12
    # The model band from the converted windows acting on D_ℓ (μK²) equals the file's C_ℓ window times
    # C_ℓ (K²), expressed in μK² — definition D_ℓ = ℓ(ℓ+1)C_ℓ/2π (common practice).
    model = bp.window @ toy_dl(bp.window_ell)
    np.testing.assert_allclose(model, 1e12 * (fields["windows/weight"] @ cl_k2), rtol=1e-12)
    np.testing.assert_allclose(bp.value, 1e12 * fields["bands/value"], rtol=1e-15)
    np.testing.assert_allclose(bp.covariance, 1e24 * fields["covariance"], rtol=1e-15)
    np.testing.assert_allclose(model, bp.value, rtol=1e-12)   # file values were built from toy_dl
    eff = fields["bands/ell_eff"]
    np.testing.assert_allclose(bp.to_dl, eff * (eff + 1) / (2 * math.pi), rtol=1e-15)

    out = tmp_path / "cl_copy.h5"
    dataset.write(bp, out)
    with h5py.File(out, "r") as h5:
        assert h5.attrs["units"] == "Cl_K2"
        np.testing.assert_allclose(h5["windows/weight"][()], fields["windows/weight"], rtol=1e-12,
                                   atol=1e-300)
        np.testing.assert_allclose(h5["bands/value"][()], fields["bands/value"], rtol=1e-15)
    assert_same(bp, dataset.load(out), rtol=1e-12)


def write_plain(tmp_path, units="Dl_uK2", sep=" ", with_eff=False, cov_suffix=".npy", name="bands"):
    lo = np.array([a for a, _ in EDGES] * 2)
    hi = np.array([b for _, b in EDGES] * 2)
    ell = np.arange(200)
    dl = toy_dl(ell)
    if units == "Dl_uK2":
        spec = dl
    else:
        spec = np.zeros(ell.size)
        spec[2:] = dl[2:] * 2 * math.pi / (ell[2:] * (ell[2:] + 1)) * 1e-12
    value = np.array([spec[a:b + 1].mean() for a, b in zip(lo, hi)])
    cols = ["kind", "ell_lo", "ell_hi", "value"] + (["ell_eff"] if with_eff else [])
    lines = ["# Toy band powers (invented)", "# " + sep.join(cols)]
    for k, a, b, v in zip(KINDS, lo, hi, value):
        row = [k, str(a), str(b), repr(float(v))] + ([str(0.5 * (a + b) + 0.5)] if with_eff else [])
        lines.append(sep.join(row))
    table = tmp_path / f"{name}{'.csv' if sep == ',' else '.txt'}"
    table.write_text("\n".join(lines) + "\n")
    rng = np.random.default_rng(2)
    a = rng.normal(size=(8, 8))
    cov = (a @ a.T + 8 * np.eye(8)) * (1.0 if units == "Dl_uK2" else 1e-24)
    cov_path = tmp_path / f"{name}_cov{cov_suffix}"
    if cov_suffix == ".npy":
        np.save(cov_path, cov)
    else:
        np.savetxt(cov_path, cov, delimiter="," if cov_suffix == ".csv" else " ")
    return table, cov_path, value, cov, dl, spec


def test_plain_dl_route_and_round_trip(tmp_path):
    table, cov_path, value, cov, dl, _ = write_plain(tmp_path)
    bp = dataset.load(table, covariance=cov_path, units="Dl_uK2")
    np.testing.assert_allclose(bp.value, value, rtol=1e-15)
    np.testing.assert_array_equal(bp.covariance, cov)
    np.testing.assert_array_equal(bp.ell_eff, 0.5 * (bp.ell_lo + bp.ell_hi))
    # top-hat windows: 1/n on ℓ_lo … ℓ_hi, zero elsewhere
    for b in range(len(bp)):
        inside = (bp.window_ell >= bp.ell_lo[b]) & (bp.window_ell <= bp.ell_hi[b])
        assert np.allclose(bp.window[b][inside], 1 / 20) and np.all(bp.window[b][~inside] == 0)
    np.testing.assert_allclose(bp.window @ dl[bp.window_ell], value, rtol=1e-12)
    digest = hashlib.sha256(table.read_bytes() + cov_path.read_bytes()).hexdigest()
    assert bp.sha256 == digest
    out = tmp_path / "plain.h5"
    dataset.write(bp, out)
    assert_same(bp, dataset.load(out))


@pytest.mark.parametrize("cov_suffix", [".csv", ".txt"])
def test_plain_cl_route_and_round_trip(tmp_path, cov_suffix):
    table, cov_path, value, cov, dl, cl = write_plain(tmp_path, "Cl_K2", sep=",", with_eff=True,
                                                      cov_suffix=cov_suffix)
    bp = dataset.load(table, covariance=cov_path, units="Cl_K2", theory_ell_max=89)
    # Model band from converted windows on D_ℓ equals the top-hat mean of C_ℓ, in μK².
    model = bp.window @ dl[bp.window_ell]
    expect = np.array([1e12 * cl[a:b + 1].mean() for a, b in zip(bp.ell_lo, bp.ell_hi)])
    np.testing.assert_allclose(model, expect, rtol=1e-12)
    np.testing.assert_allclose(bp.value, 1e12 * value, rtol=1e-15)
    np.testing.assert_allclose(bp.covariance, 1e24 * cov, rtol=1e-12)
    np.testing.assert_allclose(bp.ell_eff, 0.5 * (bp.ell_lo + bp.ell_hi) + 0.5)
    out = tmp_path / "plain_cl.h5"
    dataset.write(bp, out)
    assert_same(bp, dataset.load(out), rtol=1e-12)


def test_windows_sum_tolerance(tmp_path):
    fields, attrs = good_fields()
    fields["windows/weight"] = fields["windows/weight"] * (1 + 5e-4)
    dataset.load(write_raw(tmp_path / "ok.h5", fields, attrs))
    fields["windows/weight"] = fields["windows/weight"] * (1 + 2e-3)
    with pytest.raises(UserError, match="sum to"):
        dataset.load(write_raw(tmp_path / "bad.h5", fields, attrs))


# ------------------------------------------------------------------------------------ cuts

def test_cut_keeps_whole_bands_and_sub_covariance(tmp_path):
    bp = dataset.load(write_raw(tmp_path / "d.h5", *good_fields()))
    sub = bp.cut(spectra=["EE"], ell_min=30, ell_max=75)
    assert sub.spectra == ("EE",)
    np.testing.assert_array_equal(sub.ell_lo, [30, 50])
    idx = [5, 6]
    np.testing.assert_array_equal(sub.covariance, bp.covariance[np.ix_(idx, idx)])
    np.testing.assert_allclose(sub.window @ toy_dl(sub.window_ell), bp.value[idx], rtol=1e-12)
    assert sub.ell_max_needed <= bp.ell_max_needed
    assert len(bp.cut(ell_max=49)) == 4
    with pytest.raises(UserError, match="no band is left") as err:
        bp.cut(ell_min=80, ell_max=85)
    assert str(tmp_path / "d.h5") in str(err.value)
    with pytest.raises(UserError, match="no BB bands"):
        bp.cut(spectra=["BB"])
    with pytest.raises(UserError, match="unknown spectrum"):
        bp.cut(spectra=["XX"])
    with pytest.raises(UserError, match="needs ℓ up to"):
        bp.check_theory_ell_max(100)


# --------------------------------------------------------------------------- HDF5 validation


def _set(name, fn):
    def mutate(fields, attrs):
        fields[name] = fn(np.array(fields[name]))
    return mutate


def _attr(name, value):
    def mutate(fields, attrs):
        if value is None:
            del attrs[name]
        else:
            attrs[name] = value
    return mutate


def _drop(name):
    def mutate(fields, attrs):
        del fields[name]
    return mutate


def _with(arr, idx, val):
    arr = arr.astype(float) if isinstance(val, float) and arr.dtype.kind in "iu" else arr
    arr[idx] = val
    return arr


def _asymmetric(c):
    c = c.copy()
    c[0, 1] *= 1.001
    return c


def _not_pd(c):
    w, v = np.linalg.eigh(c)
    w[0] = -0.5
    return (v * w) @ v.T


def _overlap(lo):
    lo = lo.copy()
    lo[2] = 45                     # band 2 (TT, 45–69) overlaps band 1 (TT, 30–49)
    return lo


def _swap_first_bands(fields, attrs):
    """Bands 0 and 1 exchanged consistently in every field: a valid dataset but out of ℓ order."""
    order = [1, 0, 2, 3, 4, 5, 6, 7]
    for name in ("bands/kind", "bands/ell_lo", "bands/ell_hi", "bands/ell_eff", "bands/value",
                 "windows/weight"):
        fields[name] = np.array(fields[name])[order]
    fields["covariance"] = np.array(fields["covariance"])[np.ix_(order, order)]


def _weight_at_low_ell(w):
    w = w.copy()
    w[0, 1] = 0.01
    w[0] *= 1 / w[0].sum()
    return w


HDF5_CASES = [
    # (id, mutation, field named in the message, words in the message)
    ("missing-value", _drop("bands/value"), "bands/value", "missing"),
    ("missing-windows", _drop("windows/weight"), "windows/weight", "missing"),
    ("missing-covariance", _drop("covariance"), "covariance", "missing"),
    ("short-ell-eff", _set("bands/ell_eff", lambda a: a[:-1]), "bands/ell_eff", "7 entries"),
    ("nan-value", _set("bands/value", lambda a: _with(a, 3, np.nan)), "bands/value", "NaN"),
    ("inf-ell-eff", _set("bands/ell_eff", lambda a: _with(a, 0, np.inf)), "bands/ell_eff", "inf"),
    ("inf-covariance", _set("covariance", lambda a: _with(a, (2, 2), np.inf)), "covariance", "inf"),
    ("nan-window", _set("windows/weight", lambda a: _with(a, (1, 40), np.nan)), "windows/weight", "nan"),
    ("unknown-kind", _set("bands/kind", lambda a: _with(a, 0, b"TB")), "bands/kind", "unknown kind"),
    ("kinds-not-grouped", _set("bands/kind", lambda a: a[[0, 1, 4, 2, 3, 5, 6, 7]]), "bands/kind",
     "not grouped"),
    ("asymmetric-cov", _set("covariance", _asymmetric), "covariance", "not symmetric"),
    ("not-pos-def", _set("covariance", _not_pd), "covariance", "smallest eigenvalue -0.5"),
    ("cov-shape", _set("covariance", lambda a: a[:7, :7]), "covariance", "shape"),
    ("window-shape", _set("windows/weight", lambda a: a[:, :-1]), "windows/weight", "shape"),
    ("window-sum", _set("windows/weight", lambda a: a * 1.1), "windows/weight", "sum to 1.1"),
    ("window-low-ell", _set("windows/weight", _weight_at_low_ell), "windows/weight", "ℓ < 2"),
    ("window-grid-gap", _set("windows/ell", lambda a: np.where(a > 60, a + 1, a)), "windows/ell",
     "contiguous"),
    ("overlap", _set("bands/ell_lo", _overlap), "bands/ell_lo", "overlaps band 1"),
    ("unordered", _swap_first_bands, "bands/ell_lo", "increasing"),
    ("ell-lo-below-2", _set("bands/ell_lo", lambda a: _with(a, 4, 1)), "bands/ell_lo", "ℓ ≥ 2"),
    ("ell-hi-below-lo", _set("bands/ell_hi", lambda a: _with(a, 5, 20)), "bands/ell_hi", "before"),
    ("ell-eff-outside", _set("bands/ell_eff", lambda a: _with(a, 6, 120.0)), "bands/ell_eff",
     "outside its band"),
    ("ell-lo-not-int", _set("bands/ell_lo", lambda a: _with(a, 0, 10.5)), "bands/ell_lo", "integers"),
    ("value-is-text", _set("bands/value", lambda a: np.array([b"x"] * 8)), "bands/value", "numbers"),
    ("unknown-units", _attr("units", "Dl_mK2"), "'units'", "unknown units"),
    ("missing-units", _attr("units", None), "'units'", "missing"),
    ("wrong-format", _attr("format", "someone-elses"), "'format'", "expected 'infer-bandpowers'"),
    ("missing-format", _attr("format", None), "'format'", "missing"),
    ("newer-version", _attr("format_version", 3), "'format_version'", "newer"),
]


@pytest.mark.parametrize("mutate, field, words", [c[1:] for c in HDF5_CASES],
                         ids=[c[0] for c in HDF5_CASES])
def test_hdf5_validation_names_file_and_field(tmp_path, mutate, field, words):
    fields, attrs = good_fields()
    mutate(fields, attrs)
    path = write_raw(tmp_path / "bad.h5", fields, attrs)
    with pytest.raises(UserError) as err:
        dataset.load(path)
    msg = str(err.value)
    assert "\n" not in msg
    assert msg.startswith(str(path)), msg
    assert field in msg, msg
    assert words.lower() in msg.lower(), msg


def test_theory_reach_message(tmp_path):
    path = write_raw(tmp_path / "reach.h5", *good_fields())
    with pytest.raises(UserError) as err:
        dataset.load(path, theory_ell_max=100)
    msg = str(err.value)
    assert msg == f"{path}: windows/weight: band 3 (TT) needs ℓ up to 109 but the theory is asked for ℓ ≤ 100"
    assert dataset.load(path, theory_ell_max=109).ell_max_needed == 109


def test_unreadable_files(tmp_path):
    with pytest.raises(UserError, match="not found") as err:
        dataset.load(tmp_path / "absent.h5")
    assert str(tmp_path / "absent.h5") in str(err.value)
    junk = tmp_path / "junk.h5"
    junk.write_bytes(b"this is not HDF5 at all")
    with pytest.raises(UserError, match="not a readable HDF5 file") as err:
        dataset.load(junk)
    assert str(junk) in str(err.value)
    with pytest.raises(UserError, match="unknown dataset suffix"):
        dataset.load(tmp_path / "data.xyz")
    (tmp_path / "dir.h5").mkdir()
    with pytest.raises(UserError, match="directory"):
        dataset.load(tmp_path / "dir.h5")
    path = write_raw(tmp_path / "d.h5", *good_fields())
    with pytest.raises(UserError, match="'units' is 'Dl_uK2' but 'Cl_K2'"):
        dataset.load(path, units="Cl_K2")
    with pytest.raises(UserError, match="only read for plain-text"):
        dataset.load(path, covariance=tmp_path / "c.npy")


# ------------------------------------------------------------------------- plain-route validation

PLAIN_CASES = [
    # (id, edit of the table text, edit of the covariance (or None), load kwargs, which file, words)
    ("missing-column", lambda t: t.replace("# kind ell_lo ell_hi value", "kind ell_lo value"),
     None, {}, "table", "column ell_hi"),
    ("unknown-column", lambda t: t.replace("# kind ell_lo ell_hi value", "kind ell_lo ell_hi value sig"),
     None, {}, "table", "'sig'"),
    ("bad-number", lambda t: t.replace("TT 30 49 ", "TT 30 4x9 "), None, {}, "table", "column ell_hi"),
    ("field-count", lambda t: t.replace("TT 30 49 ", "TT 30 "), None, {}, "table", "line 4"),
    ("nan-value", lambda t: t.replace("TT 30 49 ", "TT 30 49 nan #"), None, {}, "table", "column value"),
    ("unknown-kind", lambda t: t.replace("TT 30 49", "XX 30 49"), None, {}, "table", "column kind"),
    ("overlap", lambda t: t.replace("TT 30 49", "TT 25 49"), None, {}, "table", "column ell_lo"),
    ("no-rows", lambda t: "\n".join(t.splitlines()[:2]), None, {}, "table", "no band rows"),
    ("cov-shape", None, lambda c: c[:7, :7], {}, "cov", "covariance: shape"),
    ("cov-asymmetric", None, _asymmetric, {}, "cov", "not symmetric"),
    ("cov-not-pd", None, _not_pd, {}, "cov", "not positive definite"),
    ("cov-nan", None, lambda c: _with(c, (0, 0), np.nan), {}, "cov", "covariance"),
    ("cov-pickle", None, "pickle", {}, "cov", "never unpickled"),
    ("units-missing", None, None, {"units": None}, "table", "units"),
    ("units-unknown", None, None, {"units": "Kelvin"}, "table", "unknown units 'Kelvin'"),
    ("cov-missing", None, None, {"covariance": None}, "table", "covariance file"),
    ("cov-absent", None, None, {"covariance": "absent.npy"}, "absent.npy", "not found"),
    ("theory-reach", None, None, {"theory_ell_max": 60}, "table", "needs ℓ up to 69"),
    ("ell-absurd", lambda t: t.replace("TT 30 49", "TT 30 1e12"), None, {}, "table",
     "beyond the largest multipole infer reads (100000)"),
]


@pytest.mark.parametrize("edit_table, edit_cov, kwargs, which, words", [c[1:] for c in PLAIN_CASES],
                         ids=[c[0] for c in PLAIN_CASES])
def test_plain_validation_names_file_and_field(tmp_path, edit_table, edit_cov, kwargs, which, words):
    table, cov_path, *_ = write_plain(tmp_path)
    if edit_table is not None:
        table.write_text(edit_table(table.read_text()))
    if edit_cov == "pickle":
        np.save(cov_path, np.array([{"evil": 1}], dtype=object), allow_pickle=True)
    elif edit_cov is not None:
        np.save(cov_path, edit_cov(np.load(cov_path)))
    args = {"covariance": cov_path, "units": "Dl_uK2", **kwargs}
    if args["covariance"] == "absent.npy":
        args["covariance"] = tmp_path / "absent.npy"
    with pytest.raises(UserError) as err:
        dataset.load(table, **args)
    msg = str(err.value)
    assert "\n" not in msg
    named = {"table": str(table), "cov": str(cov_path)}.get(which, str(tmp_path / which))
    assert msg.startswith(named), msg
    assert words in msg, msg


# --------------------------------------------------------------------------------------- writing

def test_write_never_overwrites_unless_asked(tmp_path):
    bp = dataset.load(write_raw(tmp_path / "d.h5", *good_fields()))
    out = tmp_path / "out.h5"
    dataset.write(bp, out)
    before = out.read_bytes()
    with pytest.raises(UserError, match="refusing to overwrite") as err:
        dataset.write(bp.cut(spectra=["TT"]), out)
    assert str(out) in str(err.value)
    assert out.read_bytes() == before
    dataset.write(bp.cut(spectra=["TT"]), out, overwrite=True)
    assert len(dataset.load(out)) == 4
    assert sorted(p.name for p in tmp_path.iterdir()) == ["d.h5", "out.h5"]


def test_write_crash_leaves_no_partial_file(tmp_path, monkeypatch):
    bp = dataset.load(write_raw(tmp_path / "d.h5", *good_fields()))
    out = tmp_path / "out.h5"
    dataset.write(bp, out)
    before = out.read_bytes()

    def crash(fd):
        raise RuntimeError("simulated crash during write")

    monkeypatch.setattr(os, "fsync", crash)
    with pytest.raises(RuntimeError):
        dataset.write(bp.cut(spectra=["EE"]), out, overwrite=True)
    with pytest.raises(RuntimeError):
        dataset.write(bp, tmp_path / "new.h5")
    assert out.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["d.h5", "out.h5"]


def test_write_checks_path(tmp_path):
    bp = dataset.load(write_raw(tmp_path / "d.h5", *good_fields()))
    with pytest.raises(UserError, match=r"\.h5 or \.hdf5"):
        dataset.write(bp, tmp_path / "out.txt")
    with pytest.raises(UserError, match="does not exist"):
        dataset.write(bp, tmp_path / "nowhere" / "out.h5")
    (tmp_path / "dir.h5").mkdir()
    with pytest.raises(UserError, match="is a directory"):
        dataset.write(bp, tmp_path / "dir.h5", overwrite=True)
    assert not any(p.name.endswith(".tmp") for p in tmp_path.iterdir())
    assert os.listdir(tmp_path / "dir.h5") == []


def test_from_arrays_builds_checked_top_hat_dataset():
    bp = dataset.from_arrays(kind=["TT", "TT"], ell_lo=[2, 12], ell_hi=[11, 21], value=[1.0, 2.0],
                             covariance=np.diag([0.1, 0.2]), units="Dl_uK2", experiment="Toy")
    np.testing.assert_allclose(bp.window.sum(axis=1), 1.0)
    assert bp.ell_max_needed == 21 and len(bp.sha256) == 64
    with pytest.raises(UserError, match="covariance: not positive definite"):
        dataset.from_arrays(kind=["TT"], ell_lo=[2], ell_hi=[11], value=[1.0], covariance=[[-1.0]])


def _text_as_npy(path):
    path.write_text("1 0\n0 1\n")


def _strings_npy(path):
    np.save(path, np.array([["a"] * 8] * 8))


def _truncated_npy(path):
    np.save(path, np.eye(8))
    path.write_bytes(path.read_bytes()[:-8])


def _empty_text(path):
    path.write_text("")


@pytest.mark.parametrize("name, make, words", [
    ("cov.npy", _text_as_npy, "not a NumPy .npy file"),
    ("cov.npy", _strings_npy, "holds <U1 values, not numbers"),
    ("cov.npy", _truncated_npy, "truncated or damaged"),
    ("cov.txt", _empty_text, "holds no numbers"),
], ids=["text-named-npy", "strings", "truncated", "empty-text"])
def test_covariance_file_problems_are_named(tmp_path, name, make, words):
    # Each says what is really wrong (not "holds Python objects" for every bad .npy), in one line and
    # without a NumPy warning.
    table, *_ = write_plain(tmp_path)
    cov = tmp_path / name
    make(cov)
    import warnings
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with pytest.raises(UserError) as err:
            dataset.load(table, covariance=cov, units="Dl_uK2")
    msg = str(err.value)
    assert msg.startswith(f"{cov}: covariance: ") and words in msg and "\n" not in msg, msg


def test_non_regular_and_looping_paths(tmp_path):
    os.symlink(tmp_path / "b.h5", tmp_path / "a.h5")
    os.symlink(tmp_path / "a.h5", tmp_path / "b.h5")
    with pytest.raises(UserError, match="symbolic links") as err:
        dataset.load(tmp_path / "a.h5")
    assert str(err.value).startswith(str(tmp_path / "a.h5"))
    os.symlink("/dev/null", tmp_path / "null.h5")
    with pytest.raises(UserError, match="not a regular file"):
        dataset.load(tmp_path / "null.h5")


def test_writer_uses_the_atomic_helper(tmp_path, monkeypatch):
    # One home for atomic writes (infer.atomic.write_atomic, with fsync): the dataset writer goes
    # through it, so a refused overwrite and a crash behave as that helper promises.
    import infer.atomic
    import infer.data.hdf5
    seen = []
    real = infer.atomic.write_atomic

    def spy(path, fill, *, overwrite=True):
        seen.append((str(path), overwrite))
        return real(path, fill, overwrite=overwrite)

    monkeypatch.setattr(infer.data.hdf5, "write_atomic", spy)
    bp = dataset.load(write_raw(tmp_path / "d.h5", *good_fields()))
    dataset.write(bp, tmp_path / "out.h5")
    assert seen == [(str(tmp_path / "out.h5"), False)]


def test_unreadable_dataset_and_covariance(tmp_path, monkeypatch):
    # Permission bits do not stop root (the test machine's user), so the refusal is simulated at the
    # one place files are read.
    import pathlib
    h5 = write_raw(tmp_path / "d.h5", *good_fields())
    table, cov_path, *_ = write_plain(tmp_path)
    real = pathlib.Path.read_bytes

    def denied(self):
        if self.name in ("d.h5", cov_path.name):
            raise PermissionError(13, "Permission denied")
        return real(self)

    monkeypatch.setattr(pathlib.Path, "read_bytes", denied)
    with pytest.raises(UserError, match=r"dataset file cannot be read \(permission denied\)") as err:
        dataset.load(h5)
    assert str(err.value).startswith(str(h5))
    with pytest.raises(UserError, match=r"covariance file cannot be read \(permission denied\)") as err:
        dataset.load(table, covariance=cov_path, units="Dl_uK2")
    assert str(err.value).startswith(str(cov_path))
