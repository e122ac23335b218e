"""SACC files (the open summary-statistics format) read as band powers, beside our own HDF5 format.

Reference for every file read here: the sacc library (PyPI, ``sacc``), its own writer — each dataset is
built with sacc's API (tracers, ``add_ell_cl`` with a ``BandpowerWindow``, ``add_covariance``) and saved
with ``Sacc.save_fits``; infer must read back the same bands, windows and covariance as our HDF5 file of
the same data. The experiment is invented (Kestrel).
"""
from __future__ import annotations

import math
import textwrap

import numpy as np
import pytest
import sacc
from scipy.integrate import trapezoid
from scipy.linalg import block_diag

from infer import data as dataset
from infer.cli import main
from infer.config import load as load_config
from infer.data import saccfile, saccwrite
from infer.data.bandpowers import Channel
from infer.errors import UserError
from infer.model.posterior import Posterior
from infer.theory.templates import NAMES, TemplateTheory

EDGES = np.array([30, 80, 130, 180, 230])          # 4 bands per block: ℓ 30–79, …, 180–229
GRID = np.arange(2, 240)                            # the BandpowerWindow ℓ values (zero weight outside bands)
BP_NU = np.linspace(190.0, 250.0, 31)               # the 220 channel's bandpass, asymmetric on purpose
BP_TAU = (BP_NU / 220.0) ** 2 * np.clip(1.0 - ((BP_NU - 220.0) / 31.0) ** 4, 0.0, None)
# File order, deliberately not ours: EE first, a TT block in decreasing ℓ, TE given as cl_e0 (E first).
BLOCKS = [  # (SACC data type, tracer 1, tracer 2, our kind, T-side channel, other channel, reversed)
    ("cl_ee", "150_s2", "150_s2", "EE", "150", "150", False),
    ("cl_00", "90_s0", "90_s0", "TT", "90", "90", False),
    ("cl_0e", "90_s0", "150_s2", "TE", "90", "150", False),
    ("cl_00", "90_s0", "150_s0", "TT", "90", "150", True),
    ("cl_e0", "220_s2", "150_s0", "TE", "150", "220", False),
    ("cl_00", "150_s0", "220_s0", "TT", "150", "220", False),
]
#: Our canonical order (kinds TT, TE, EE; pairs by first appearance in the file; then ℓ), written out by hand.
CANONICAL = [("TT", "90", "90"), ("TT", "90", "150"), ("TT", "150", "220"), ("TE", "90", "150"),
             ("TE", "150", "220"), ("EE", "150", "150")]


def band_windows() -> np.ndarray:
    """(GRID.size, 4): a tapered weight inside each band, zero outside, each column summing to 1."""
    w = np.zeros((GRID.size, EDGES.size - 1))
    for b, (lo, hi) in enumerate(zip(EDGES[:-1], EDGES[1:] - 1)):
        ell = np.arange(lo, hi + 1)
        shape = np.sin(math.pi * (ell - lo + 0.5) / ell.size)
        w[ell - GRID[0], b] = shape / shape.sum()
    return w


def truth_cl() -> dict:
    """The template model at a = 1 as C_ℓ in μK² (the file declares Cl_uK2)."""
    dl = TemplateTheory(300, {}).compute(dict.fromkeys(NAMES, 1.0)).dl
    ell = np.arange(301.0)
    fac = np.zeros_like(ell)
    fac[2:] = 2 * math.pi / (ell[2:] * (ell[2:] + 1))
    return {k: v * fac for k, v in dl.items()}


def build(units_meta=None, cov_kind="full", seed=3):
    """The Kestrel three-channel dataset as (a sacc.Sacc, records in file order, file-order covariance)."""
    s = sacc.Sacc()
    if units_meta:
        s.metadata["units"] = units_meta
    s.metadata["experiment"] = "Kestrel (invented)"
    for ch in ("90", "150"):
        for spin in (0, 2):
            s.add_tracer("NuMap", f"{ch}_s{spin}", quantity="cmb_temperature" if spin == 0 else "cmb_polarization",
                         spin=spin, nu=[float(ch)], bandpass=[1.0], ell=GRID, beam=np.ones(GRID.size),
                         map_unit="uK_CMB")
    for spin in (0, 2):
        s.add_tracer("NuMap", f"220_s{spin}", spin=spin, nu=BP_NU, bandpass=BP_TAU, ell=GRID,
                     beam=np.ones(GRID.size), map_unit="uK_CMB")
    w = band_windows()
    ell_eff = GRID @ w
    cl = truth_cl()
    records, values = [], []
    for i, (dt, t1, t2, kind, ca, cb, rev) in enumerate(BLOCKS):
        val = w.T @ cl[kind][GRID] * (1.0 + 0.01 * i)
        order = np.arange(4)[::-1] if rev else np.arange(4)
        win = sacc.BandpowerWindow(GRID, w[:, order])
        s.add_ell_cl(dt, t1, t2, ell_eff[order], val[order], window=win)
        for b in order:
            records.append((kind, ca, cb, int(b)))
            values.append(val[b])
    n = len(records)
    rng = np.random.default_rng(seed)
    sigma = 0.05 * np.abs(np.array(values)) + 1e-4
    a = rng.normal(size=(n, n))
    corr = a @ a.T / n + np.eye(n)
    corr /= np.sqrt(np.outer(np.diag(corr), np.diag(corr)))
    cov = corr * np.outer(sigma, sigma)
    if cov_kind == "diagonal":
        cov = np.diag(np.diag(cov))
        s.add_covariance(np.diag(cov))
    elif cov_kind == "block":
        blocks = [cov[i:i + 4, i:i + 4] for i in range(0, n, 4)]
        cov = block_diag(*blocks)
        s.add_covariance(blocks)
    elif cov_kind == "full":
        s.add_covariance(cov)
    return s, records, cov, w, ell_eff


def centre_220() -> float:
    """Transmission-weighted mean frequency of the 220 bandpass (scipy.integrate.trapezoid)."""
    return float(trapezoid(BP_TAU * BP_NU, BP_NU) / trapezoid(BP_TAU, BP_NU))


def ours(records, cov, w, ell_eff, path):
    """Our HDF5 file of the same data, in the canonical order, written with infer.data.hdf5's writer."""
    cl = truth_cl()
    order = sorted(range(len(records)), key=lambda i: (CANONICAL.index(records[i][:3]), records[i][3]))
    rec = [records[i] for i in order]
    value = []
    for (kind, ca, cb, b), i in zip(rec, order):
        blk = [j for j, B in enumerate(BLOCKS) if (B[3], B[4], B[5]) == (kind, ca, cb)][0]
        value.append((w.T @ cl[kind][GRID])[b] * (1.0 + 0.01 * blk))
    bp = dataset.from_arrays(
        kind=[r[0] for r in rec], ell_lo=[EDGES[r[3]] for r in rec], ell_hi=[EDGES[r[3] + 1] - 1 for r in rec],
        ell_eff=[ell_eff[r[3]] for r in rec], value=value, covariance=cov[np.ix_(order, order)],
        window_ell=GRID, window=np.array([w[:, r[3]] for r in rec]), units="Cl_uK2",
        experiment="Kestrel (invented)", channel_1=[r[1] for r in rec], channel_2=[r[2] for r in rec],
        channels=(Channel("90", 90.0), Channel("150", 150.0), Channel("220", centre_220(), BP_NU, BP_TAU)))
    return dataset.load(dataset.hdf5.write(bp, path))


def save(s, path):
    s.save_fits(str(path), overwrite=True)
    return path


def same(a, b):
    """Every field a likelihood or a cut reads, equal (FITS stores float64 exactly)."""
    for field in ("kind", "channel_1", "channel_2", "ell_lo", "ell_hi", "window_ell"):
        np.testing.assert_array_equal(getattr(a, field), getattr(b, field), err_msg=field)
    for field in ("ell_eff", "value", "covariance", "window", "to_dl"):
        np.testing.assert_allclose(getattr(a, field), getattr(b, field), rtol=1e-13, atol=0, err_msg=field)
    assert [(c.name, c.nu_ghz) for c in a.channels] == pytest.approx([(c.name, c.nu_ghz) for c in b.channels])
    for ca, cb in zip(a.channels, b.channels):
        assert (ca.bandpass_nu_ghz is None) == (cb.bandpass_nu_ghz is None), ca.name
        if ca.bandpass_nu_ghz is not None:
            np.testing.assert_array_equal(ca.bandpass_nu_ghz, cb.bandpass_nu_ghz)
            np.testing.assert_array_equal(ca.bandpass_weight, cb.bandpass_weight)
    assert a.units == b.units and a.experiment == b.experiment


# -- the main job: a file written by sacc reads back as our HDF5 file of the same data --------------------

@pytest.mark.parametrize("cov_kind", ["full", "block", "diagonal"])
def test_sacc_file_reads_as_our_hdf5_file(tmp_path, cov_kind):
    # reference: the sacc library (PyPI), its own writer (Sacc.save_fits) and covariance types
    s, records, cov, w, ell_eff = build(cov_kind=cov_kind)
    got = dataset.load(save(s, tmp_path / "kestrel.fits"), units="Cl_uK2")
    want = ours(records, cov, w, ell_eff, tmp_path / "kestrel.h5")
    same(got, want)
    assert got.spectra == ("TT", "TE", "EE")
    assert got.pairs == ("90x90", "90x150", "150x220", "150x150")
    assert got.channels[2].nu_ghz == pytest.approx(centre_220(), rel=1e-12)   # scipy.integrate.trapezoid
    # The file's own dense covariance, permuted: the one sacc reports (reference: sacc's .dense).
    assert np.allclose(np.sort(got.covariance.ravel()), np.sort(sacc.Sacc.load_fits(str(tmp_path / "kestrel.fits"))
                                                                .covariance.dense.ravel()))


def test_units_from_the_file_metadata_and_the_sha(tmp_path):
    s = build(units_meta="Cl_uK2")[0]
    path = save(s, tmp_path / "k.sacc")
    bp = dataset.load(path)
    assert bp.units == "Cl_uK2"
    import hashlib
    assert bp.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    assert dataset.load(path, units="Cl_uK2").value.tolist() == bp.value.tolist()


def test_fits_signature_dispatch_without_a_sacc_suffix(tmp_path):
    path = save(build(units_meta="Cl_uK2")[0], tmp_path / "k.fits")
    other = tmp_path / "k.bin"
    other.write_bytes(path.read_bytes())
    assert saccfile.is_sacc(other) and not saccfile.is_sacc(tmp_path / "absent.bin")
    np.testing.assert_array_equal(dataset.load(other).value, dataset.load(path).value)


def test_single_channel_tophat_windows_and_dl_units(tmp_path):
    # reference: the sacc library (PyPI), its own writer; MiscTracer without frequency, TopHatWindow
    s = sacc.Sacc()
    s.add_tracer("Misc", "cmb")
    for lo, hi in zip(EDGES[:-1], EDGES[1:]):
        s.add_data_point("cl_00", ("cmb", "cmb"), 1000.0 + lo, ell=0.5 * (lo + hi - 1),
                         window=sacc.TopHatWindow(int(lo), int(hi)))   # SACC: [min, max)
    s.add_covariance(np.full(4, 25.0))
    bp = dataset.load(save(s, tmp_path / "one.fits"), units="Dl_uK2")
    assert bp.pairs == ("",) and bp.channels[0].name == ""
    np.testing.assert_array_equal(bp.ell_lo, EDGES[:-1])
    np.testing.assert_array_equal(bp.ell_hi, EDGES[1:] - 1)
    top = dataset.from_arrays(kind=["TT"] * 4, ell_lo=EDGES[:-1], ell_hi=EDGES[1:] - 1, value=1000.0 + EDGES[:-1],
                              covariance=np.eye(4) * 25.0, units="Dl_uK2")    # our top-hats
    np.testing.assert_allclose(bp.window, top.window, rtol=1e-14)
    np.testing.assert_array_equal(bp.window_ell, top.window_ell)


def test_overlapping_windows_get_edges_halfway_between_effective_multipoles(tmp_path):
    s = sacc.Sacc()
    s.add_tracer("Misc", "cmb")
    ell = np.arange(2, 400)
    centres = np.array([100.0, 160.0, 230.0])
    w = np.exp(-0.5 * ((ell[:, None] - centres[None, :]) / 25.0) ** 2)
    w /= w.sum(0)
    eff = ell @ w
    s.add_ell_cl("cl_00", "cmb", "cmb", eff, [10.0, 9.0, 8.0], window=sacc.BandpowerWindow(ell, w))
    s.add_covariance(np.ones(3))
    bp = dataset.load(save(s, tmp_path / "g.fits"), units="Cl_uK2")
    mid = np.floor(0.5 * (eff[:-1] + eff[1:])).astype(int)
    np.testing.assert_array_equal(bp.ell_hi[:-1], mid)
    np.testing.assert_array_equal(bp.ell_lo[1:], mid + 1)
    assert bp.ell_lo[0] == 2 and bp.ell_hi[-1] == 399          # outer edges: the window support


def test_our_writer_round_trip_read_by_sacc_itself(tmp_path):
    s, records, cov, w, ell_eff = build()
    want = ours(records, cov, w, ell_eff, tmp_path / "kestrel.h5")
    path = dataset.write(want, tmp_path / "out.fits")
    back = sacc.Sacc.load_fits(str(path))                       # reference: the sacc library (PyPI), its reader
    assert back.metadata["units"] == "Cl_uK2" and len(back) == len(want)
    assert set(back.get_data_types()) == {"cl_00", "cl_0e", "cl_ee"}
    np.testing.assert_allclose(back.mean, want.value)           # Cl_uK2: stored as declared
    np.testing.assert_allclose(back.covariance.dense, want.covariance)
    same(dataset.load(path), want)
    with pytest.raises(UserError, match="refusing to overwrite"):
        dataset.write(want, path)
    assert dataset.check_target(tmp_path / "new.sacc").name == "new.sacc"


def test_writer_keeps_noise_fiducial_bandpass_and_kelvin_units(tmp_path):
    rng = np.random.default_rng(5)
    n = 6
    bp = dataset.from_arrays(
        kind=["TT"] * 3 + ["EE"] * 3, ell_lo=[30, 80, 130] * 2, ell_hi=[79, 129, 179] * 2,
        value=rng.uniform(1e-9, 2e-9, n), covariance=np.diag(rng.uniform(1e-21, 2e-21, n)), units="Dl_K2",
        channel_1=["K90", "K90", "K90", "K150", "K150", "K150"], channel_2=["K150"] * 6,
        channels=(Channel("K90", 90.0), Channel("K150", 150.0, BP_NU - 70.0, BP_TAU)),
        noise=np.r_[rng.uniform(1e-10, 2e-10, 5), np.nan], fiducial=rng.uniform(1e-9, 2e-9, n))
    path = dataset.write(bp, tmp_path / "k.fits", description="invented Kestrel mock")
    raw = sacc.Sacc.load_fits(str(path))              # reference: the sacc library (PyPI), its reader
    np.testing.assert_allclose(raw.mean, np.asarray(bp.value) / 1e12)   # stored in the declared unit, K²
    assert raw.tracers["K150_s2"].map_unit == "K_CMB" and raw.metadata["description"] == "invented Kestrel mock"
    back = dataset.load(path)
    same(back, bp)
    np.testing.assert_array_equal(back.noise, bp.noise)                 # NaN: absent, kept as absent
    np.testing.assert_array_equal(back.fiducial, bp.fiducial)


def test_writer_refuses_beam_modes_and_replace_guard(tmp_path):
    bp = dataset.from_arrays(kind=["TT"] * 2, ell_lo=[30, 80], ell_hi=[79, 129], value=[1.0, 2.0],
                             covariance=np.eye(2), beam_modes=np.ones((1, 2)))
    with pytest.raises(UserError, match="beam modes, which SACC cannot hold"):
        dataset.write(bp, tmp_path / "b.fits")
    assert not (tmp_path / "b.fits").exists()
    foreign = save(_minimal(), tmp_path / "foreign.fits")
    with pytest.raises(UserError, match="not written by infer"):
        saccwrite.replaceable(foreign)
    ours_file = dataset.write(dataset.from_arrays(kind=["TT"], ell_lo=[30], ell_hi=[79], value=[1.0],
                                                  covariance=np.eye(1)), tmp_path / "o.fits")
    saccwrite.replaceable(ours_file)
    junk = tmp_path / "j.fits"
    junk.write_text("hello")
    with pytest.raises(UserError, match="not a FITS file.*--replace only overwrites"):
        saccwrite.replaceable(junk)


def test_long_type_names_and_a_beam_warning(tmp_path, caplog, monkeypatch):
    import logging
    monkeypatch.setattr(logging.getLogger("infer"), "propagate", True)    # an earlier CLI test may have cut it
    s = sacc.Sacc()
    for spin in (0, 2):
        beam = np.exp(-GRID * (GRID + 1) * 1e-6) if spin == 0 else np.ones(GRID.size)
        s.add_tracer("NuMap", f"K90_s{spin}", spin=spin, nu=[90.0], bandpass=[1.0], ell=GRID, beam=beam)
    ell = np.arange(30, 80)
    win = sacc.BandpowerWindow(ell, np.full((ell.size, 1), 1.0 / ell.size))
    for dt, t in (("cmb_polarization_cl_ee", ("K90_s2", "K90_s2")), ("cmb_temperature_cl", ("K90_s0", "K90_s0")),
                  ("cmb_temperaturePolarization_cl_e", ("K90_s0", "K90_s2"))):
        s.add_ell_cl(dt, *t, [55.0], [3.0], window=win)
    s.add_covariance(np.ones(3))
    with caplog.at_level("WARNING", logger="infer"):
        bp = dataset.load(save(s, tmp_path / "long.fits"), units="Cl_uK2")
    assert bp.spectra == ("TT", "TE", "EE") and bp.pairs == ("K90xK90",)
    assert "'K90_s0' carries a beam" in caplog.text and "K90_s2" not in caplog.text


# -- a run file on a SACC dataset ---------------------------------------------------------------------------

def run_file(tmp_path, data, units):
    params = "\n".join(f"[parameters.{n}]\nprior = {{ uniform = [0.0, 3.0] }}\nguess = 1.0\nspread = 0.05\n"
                       for n in NAMES)
    extra = f'units = "{units}"\n' if units else ""
    text = textwrap.dedent(f"""\
        [run]
        name = "sacc-{data.suffix[1:]}"

        [dataset]
        file = "{data}"
        """) + extra + textwrap.dedent(f"""
        [theory]
        code = "templates"

        [sampling]
        walkers = 16
        steps = 10

        [output]
        chain = "{tmp_path / 'chain.h5'}"
        """) + params
    path = tmp_path / f"run_{data.suffix[1:]}.toml"
    path.write_text(text)
    return path


def test_posterior_on_a_sacc_file_equals_the_hdf5_route(tmp_path, capsys):
    s, records, cov, w, ell_eff = build()
    fits = save(s, tmp_path / "x.fits")
    h5 = tmp_path / "x.h5"
    ours(records, cov, w, ell_eff, h5)
    a = Posterior(load_config(run_file(tmp_path, fits, "Cl_uK2")))
    b = Posterior(load_config(run_file(tmp_path, h5, None)))
    rng = np.random.default_rng(0)
    for x in [np.ones(4)] + [1.0 + 0.1 * rng.normal(size=4) for _ in range(3)]:
        la, lb = a(x)[0], b(x)[0]
        assert math.isfinite(la) and la == pytest.approx(lb, rel=1e-12, abs=1e-9)
    assert main(["check", str(run_file(tmp_path, fits, "Cl_uK2")), "--calls", "1"]) == 0
    assert "24 bands (TT/TE/EE)" in capsys.readouterr().out


def test_run_file_without_units_fails_in_one_line(tmp_path, capsys):
    fits = save(build()[0], tmp_path / "x.fits")
    assert main(["check", str(run_file(tmp_path, fits, None))]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and str(fits) in err[0] and "dataset.units" in err[0], err


# -- bad input: one line naming the file and the problem ---------------------------------------------------

def _minimal(dtype="cl_00", t=("cmb_s0", "cmb_s0"), window=True, cov=True, map_unit="uK_CMB", spins=(0, 2),
             weight=1.0, tracers=None):
    s = sacc.Sacc()
    for name, spin in (tracers if tracers is not None else [("cmb_s0", spins[0]), ("cmb_s2", spins[1])]):
        s.add_tracer("Map", name, spin=spin, ell=GRID, beam=np.ones(GRID.size), map_unit=map_unit)
    ell = np.arange(30, 80)
    win = sacc.BandpowerWindow(ell, np.full((ell.size, 1), weight / ell.size)) if window else None
    s.add_ell_cl(dtype, t[0], t[1], [55.0], [3.0], window=win, tracers_later=True)
    if cov:
        s.add_covariance(np.array([[4.0]]) if cov is True else cov)
    return s



BAD = [
    ("unknown-type", lambda: _minimal(dtype="galaxy_density_cl"), "Cl_uK2", ["data type 'galaxy_density_cl'"]),
    ("tb-type", lambda: _minimal(dtype="cl_0b", t=("cmb_s0", "cmb_s2")), "Cl_uK2", ["cl_0b", "not modelled"]),
    ("no-window", lambda: _minimal(window=False), "Cl_uK2", ["data point 0", "window: missing"]),
    ("no-covariance", lambda: _minimal(cov=False), "Cl_uK2", ["no covariance"]),
    ("no-units", lambda: _minimal(), None, ["C_ℓ or D_ℓ", "dataset.units"]),
    ("map-unit", lambda: _minimal(map_unit="K_CMB"), "Cl_uK2", ["map_unit 'K_CMB'"]),
    ("window-sum", lambda: _minimal(weight=0.5), "Cl_uK2", ["windows", "sum to 0.5"]),
    ("spin", lambda: _minimal(dtype="cl_0e", t=("cmb_s0", "cmb_s0")), "Cl_uK2", ["'cmb_s0' has spin 0", "TE"]),
    ("not-positive", lambda: _minimal(cov=np.array([[-1.0]])), "Cl_uK2", ["covariance", "not positive definite"]),
    ("channel-name", lambda: _minimal(t=("mix", "mix"), tracers=[("mix", 0)]), "Cl_uK2", ["'mix'", "channel name"]),
    ("band-twice", lambda: _twice(), "Cl_uK2", ["data points 0 and 1", "one band given twice"]),
    ("ell-fraction", lambda: _odd_window(np.arange(30, 80) + 0.5), "Cl_uK2", ["data point 0", "integers"]),
    ("ell-negative", lambda: _odd_window(np.arange(-5, 45)), "Cl_uK2", ["data point 0", "≥ 0"]),
    ("ghost-tracer", lambda: _minimal(t=("ghost", "ghost"), tracers=[]), "Cl_uK2", ["'ghost'", "not defined"]),
]


def _twice():
    s = _minimal(cov=False)
    ell = np.arange(30, 80)
    s.add_ell_cl("cl_00", "cmb_s0", "cmb_s0", [55.0], [3.0],
                 window=sacc.BandpowerWindow(ell, np.full((ell.size, 1), 1.0 / ell.size)))
    s.add_covariance(np.ones(2))
    return s


def _odd_window(ell):
    s = sacc.Sacc()
    s.add_tracer("Misc", "cmb")
    s.add_ell_cl("cl_00", "cmb", "cmb", [40.0], [3.0],
                 window=sacc.BandpowerWindow(ell, np.full((ell.size, 1), 1.0 / ell.size)))
    s.add_covariance(np.ones(1))
    return s


@pytest.mark.parametrize("name,make,units,words", BAD, ids=[b[0] for b in BAD])
def test_bad_sacc_input_is_one_line(tmp_path, name, make, units, words):
    path = save(make(), tmp_path / f"{name}.fits")
    with pytest.raises(UserError) as err:
        dataset.load(path, units=units)
    msg = str(err.value)
    assert "\n" not in msg and msg.startswith(str(path)), msg
    for word in words:
        assert word in msg, msg


def test_bad_files_and_arguments(tmp_path):
    junk = tmp_path / "junk.fits"
    junk.write_bytes(b"this is not FITS")
    with pytest.raises(UserError, match="not a FITS file"):
        dataset.load(junk)
    from astropy.io import fits
    bare = tmp_path / "bare.fits"
    fits.PrimaryHDU().writeto(bare)
    with pytest.raises(UserError, match=f"{bare}: the SACC file holds no data points"):
        dataset.load(bare, units="Cl_uK2")
    good = save(_minimal(), tmp_path / "good.fits")
    with pytest.raises(UserError, match="holds its own covariance"):
        dataset.load(good, covariance=tmp_path / "cov.txt", units="Cl_uK2")
    meta = _minimal()
    meta.metadata["units"] = "Dl_uK2"
    with pytest.raises(UserError, match="metadata 'units' is 'Dl_uK2' but 'Cl_uK2' was asked for"):
        dataset.load(save(meta, tmp_path / "meta.fits"), units="Cl_uK2")
    truncated = tmp_path / "truncated.fits"
    truncated.write_bytes(good.read_bytes()[:3000])
    with pytest.raises(UserError, match="truncated.fits: the SACC file holds no data points .astropy: .*2880"):
        dataset.load(truncated, units="Cl_uK2")
    wrong = _minimal()
    wrong.covariance = sacc.covariance.FullCovariance(np.eye(2))       # bypasses sacc's own size check
    with pytest.raises(UserError, match="wrong size|shape"):
        dataset.load(save(wrong, tmp_path / "wrong.fits"), units="Cl_uK2")


def test_two_tracers_of_one_channel_must_agree_on_frequency(tmp_path):
    s = sacc.Sacc()
    s.add_tracer("NuMap", "k90_s0", spin=0, nu=[90.0], bandpass=[1.0], ell=GRID, beam=np.ones(GRID.size))
    s.add_tracer("NuMap", "k90_s2", spin=2, nu=[95.0], bandpass=[1.0], ell=GRID, beam=np.ones(GRID.size))
    ell = np.arange(30, 80)
    s.add_ell_cl("cl_0e", "k90_s0", "k90_s2", [55.0], [3.0],
                 window=sacc.BandpowerWindow(ell, np.full((ell.size, 1), 1.0 / ell.size)))
    s.add_covariance(np.ones(1))
    path = save(s, tmp_path / "nu.fits")
    with pytest.raises(UserError, match="tracers 'k90_s0' and 'k90_s2' are both channel 'k90' but differ"):
        dataset.load(path, units="Cl_uK2")
