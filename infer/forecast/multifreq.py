"""Multi-frequency mock band powers of an invented experiment: CMB, foregrounds, per-channel noise and beams.

A multi-frequency spec is a TOML file of our own layout (``infer simulate`` recognises it by its
``[channels]`` tables)::

    [experiment]      name, fsky, ell_min, ell_max, bin_width, spectra, pairs (optional "AxB" list)
    [channels.NAME]   one per frequency channel (`infer.forecast.channels`): nu_ghz, noise_uK_arcmin,
                      beam_fwhm_arcmin, bandpass, beam_error, and the instrument truths calibration,
                      pol_efficiency, beam_truth
    [fiducial]        the theory's parameters, as in a single-channel spec
    [theory]          the backend (default CAMB, standard accuracy)
    [nuisance]        the foreground model, with the same keys as a run file's [nuisance] section
    [sky]             the foreground parameters' true values (names as in run files: ps_90x150, cib_amp, …)
    [mock]            seed, realise, output, description

The mean band powers are the run-time model itself at the truths (`infer.model.nuisance`): the binned
theory B, plus the foreground terms, times the instrument factor of each channel pair (calibrations,
polarisation efficiencies and beam-mode amplitudes) — so a fit with the matching nuisance model has the
truths as its noise-free optimum. Bands are top-hat bins; the dataset carries the channels (frequencies,
bandpasses), the beam modes (K = channels × modes per channel, `infer.forecast.channels`), the per-band
noise of auto-spectra and the fiducial model (what the Hamimeche–Lewis likelihood needs).

The covariance is the Gaussian (Wick) covariance of cross-spectra (`infer.forecast.knox.cross_covariance`,
Knox 1995 generalised to several fields) of the signal-plus-noise matrix of the fields T_c, E_c, whose sky
part holds the CMB and the foregrounds (each band's foreground power taken as constant across its bin —
an approximation of the mock's covariance only; the data are drawn from exactly this covariance) and
whose instrument part holds the calibrations, efficiencies and white noise behind each beam. One draw
from that Gaussian is added with ``realise``.
"""
from __future__ import annotations

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10
    import tomli as tomllib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from infer import data, validate
from infer.data.bandpowers import Channel
from infer.data.checks import read_bytes
from infer.errors import UserError
from infer.forecast import channels as chans
from infer.forecast.experiment import MAX_BANDS, _fiducial, _mock_options
from infer.forecast.knox import cross_covariance, noise_dl

TABLES = ("experiment", "channels", "fiducial", "mock", "theory", "nuisance", "sky")
EXPERIMENT_KEYS = ("name", "fsky", "ell_min", "ell_max", "bin_width", "spectra", "pairs")


@dataclass(frozen=True)
class MultiSpec:
    """A checked multi-frequency spec."""

    path: str
    name: str
    fsky: float
    ell_min: int
    ell_max: int
    bin_width: int
    spectra: tuple[str, ...]
    channels: tuple            # of `infer.forecast.channels.ChannelSpec`
    spectra_list: tuple        # (kind, channel_1, channel_2) in dataset order
    fiducial: dict
    theory: dict
    nuisance: object           # `infer.model.nuisance.NuisanceOptions`
    sky: dict
    mock: dict

    @property
    def n_bins(self) -> int:
        return (self.ell_max - self.ell_min + 1) // self.bin_width


def is_multifrequency(path) -> bool:
    """Whether the spec at ``path`` has ``[channels]`` tables (a parse error is left to the readers)."""
    try:
        return "channels" in tomllib.loads(read_bytes(Path(path), "experiment spec").decode("utf-8"))
    except (UnicodeDecodeError, tomllib.TOMLDecodeError):
        return False


def read_spec(path) -> MultiSpec:
    """Read and check a multi-frequency spec (one line naming the file and key for every error)."""
    from infer.model import nuisance
    path = Path(path)
    where = str(path)
    try:
        spec = tomllib.loads(read_bytes(path, "experiment spec").decode("utf-8"))
    except UnicodeDecodeError:
        raise UserError(f"{path}: experiment spec is not UTF-8 text") from None
    except tomllib.TOMLDecodeError as exc:
        raise UserError(f"{path}: not valid TOML ({' '.join(str(exc).split())})") from None
    for key in spec:
        if key not in TABLES:
            raise UserError(f"{path}: unknown table [{key}] (known: {', '.join(TABLES)})")
    for table in ("experiment", "channels", "fiducial"):
        if table not in spec:
            raise UserError(f"{path}: table [{table}] is missing")
    e = spec["experiment"]
    validate.check_keys(where, "experiment", e, set(EXPERIMENT_KEYS))
    for key in EXPERIMENT_KEYS[:-1]:
        if key not in e:
            raise UserError(f"{path}: missing key 'experiment.{key}'")
    name = validate.text(where, "experiment.name", e["name"], line=True)
    fsky = float(validate.number(where, "experiment.fsky", e["fsky"], low=1e-6, high=1.0))
    lmin = int(validate.number(where, "experiment.ell_min", e["ell_min"], integer=True, low=2, high=20_000))
    lmax = int(validate.number(where, "experiment.ell_max", e["ell_max"], integer=True, low=lmin, high=20_000))
    width = int(validate.number(where, "experiment.bin_width", e["bin_width"], integer=True, low=1,
                                high=lmax - lmin + 1))
    spectra = e["spectra"]
    if not (isinstance(spectra, list) and spectra and all(s in ("TT", "TE", "EE") for s in spectra)
            and len(set(spectra)) == len(spectra)):
        raise UserError(f"{path}: 'experiment.spectra' must list distinct TT, TE, EE, got {validate.show(spectra)}")
    channels = chans.read_channels(where, spec["channels"], path.resolve().parent, lmax)
    if len({c.nu_ghz for c in channels}) != len(channels):
        raise UserError(f"{path}: two channels share a frequency")
    listed = chans.cross_pairs(where, channels, tuple(spectra), e.get("pairs"))
    n_bins = (lmax - lmin + 1) // width
    if n_bins * len(listed) > MAX_BANDS:
        raise UserError(f"{path}: {n_bins * len(listed)} bands (more than {MAX_BANDS}); widen the bins or "
                        "name fewer pairs")
    theory = dict(spec.get("theory", {"code": "camb", "accuracy": "standard"}))
    if "code" not in theory:
        raise UserError(f"{path}: missing key 'theory.code'")
    fiducial = _fiducial(where, spec["fiducial"], theory["code"] == "camb")
    options = nuisance.read_section(where, spec.get("nuisance", {}), path.resolve().parent, theory, ())
    sky = spec.get("sky", {})
    for key, val in sky.items():
        validate.number(where, f"sky.{key}", val)
    return MultiSpec(where, name, fsky, lmin, lmax, width, tuple(spectra), channels, tuple(listed),
                     fiducial, theory, options, {k: float(v) for k, v in sky.items()},
                     _mock_options(path, spec.get("mock", {})))


def _layout(spec: MultiSpec):
    """Per band: kind, channels, ℓ range; and the ℓ grid of the bins."""
    lo = spec.ell_min + spec.bin_width * np.arange(spec.n_bins)
    kind, c1, c2, ell_lo = [], [], [], []
    for k, a, b in spec.spectra_list:
        kind += [k] * spec.n_bins
        c1 += [a] * spec.n_bins
        c2 += [b] * spec.n_bins
        ell_lo.append(lo)
    return np.array(kind), np.array(c1), np.array(c2), np.concatenate(ell_lo)


def _beam_modes(spec: MultiSpec, c1, c2, ell_lo) -> np.ndarray:
    """(C·K, N): mode k of channel c changes band (i, j) by ([c = i] + [c = j]) s_k ⟨φ_k⟩_bin."""
    k_modes = len(spec.channels[0].beam_error)
    ell = np.arange(spec.ell_min, spec.ell_min + spec.n_bins * spec.bin_width)
    rows = []
    for c in spec.channels:
        shapes = chans.beam_mode_shapes(ell, c.beam_fwhm_arcmin, k_modes)
        binned = shapes.reshape(k_modes, spec.n_bins, spec.bin_width).mean(axis=2)     # (K, n_bins)
        index = (ell_lo - spec.ell_min) // spec.bin_width
        for k in range(k_modes):
            hits = (c1 == c.name).astype(float) + (c2 == c.name).astype(float)
            rows.append(hits * c.beam_error[k] * binned[k, index])
    return np.array(rows).reshape(len(rows), len(c1))


def truths(spec: MultiSpec) -> dict[str, float]:
    """The nuisance parameters' true values of the mock: [sky] and the channels' instrument truths."""
    from infer.model.foregrounds import channel_key
    out = dict(spec.sky)
    for c in spec.channels:
        out[f"cal_{channel_key(c.name)}"] = c.calibration
        out[f"poleff_{channel_key(c.name)}"] = c.pol_efficiency
    k_modes = len(spec.channels[0].beam_error)
    for i, c in enumerate(spec.channels):
        for k in range(k_modes):
            out[f"beam_{i * k_modes + k}"] = c.beam_truth[k]
    return out


def _draft(spec: MultiSpec, B=None):
    """The mock's bands (value B, unit covariance) and its nuisance model."""
    from scipy import sparse
    from infer.model.nuisance import NuisanceModel
    kind, c1, c2, ell_lo = _layout(spec)
    channels = [Channel(c.name, c.nu_ghz, c.bandpass_nu_ghz, c.bandpass_weight) for c in spec.channels]
    n = len(kind)
    draft = data.from_arrays(kind=kind, ell_lo=ell_lo, ell_hi=ell_lo + spec.bin_width - 1,
                             value=np.ones(n) if B is None else B, covariance=np.eye(n), channel_1=c1,
                             channel_2=c2, channels=channels, beam_modes=_beam_modes(spec, c1, c2, ell_lo))
    model = NuisanceModel(draft, sparse.csr_matrix(np.asarray(draft.window, float)), draft.window_ell,
                          spec.nuisance, where=f"{spec.path}: [nuisance]")
    return draft, model


def check_sky(spec: MultiSpec) -> None:
    """Every [sky] name is a parameter of the spec's foreground model (before any theory call)."""
    _, model = _draft(spec)
    for key in spec.sky:
        if key not in model.defaults or key.startswith(("cal_", "poleff_", "beam_", "calibration")):
            raise UserError(f"{spec.path}: 'sky.{key}' is not a foreground parameter of this spec's [nuisance] "
                            f"model (known: {', '.join(sorted(model.amplitudes) + sorted(model.ranges))}; "
                            "instrument truths go in [channels.NAME])")


def simulate(spec: MultiSpec, spectra, seed=None, realise: bool = True) -> data.BandPowers:
    """The mock dataset of ``spec`` for the theory ``spectra`` (module docstring)."""
    check_sky(spec)
    kind, c1, c2, ell_lo = _layout(spec)
    ell_hi = ell_lo + spec.bin_width - 1
    n = len(kind)
    ell = np.arange(spec.ell_min, spec.ell_min + spec.n_bins * spec.bin_width)
    binned = {k: np.asarray(spectra.dl[k], float)[ell].reshape(spec.n_bins, spec.bin_width).mean(axis=1)
              for k in spec.spectra}
    index = (ell_lo - spec.ell_min) // spec.bin_width
    B = np.array([binned[k][i] for k, i in zip(kind, index)])
    draft, model = _draft(spec, B)
    truth = truths(spec)
    mean = model.apply(B, truth)
    # The sky's foreground power per (kind, a, b) for the covariance: each band's value across its bin.
    fg_bands = model.foreground(model.values({k: v for k, v in truth.items() if k in spec.sky}, 1))
    fg_bands = np.zeros(n) if np.isscalar(fg_bands) else np.asarray(fg_bands)[0]
    foreground = {}
    for k, a, b in spec.spectra_list:
        rows = np.flatnonzero((kind == k) & (c1 == a) & (c2 == b))
        foreground[(k, a, b)] = np.repeat(fg_bands[rows], spec.bin_width)
    dl = {k: np.asarray(spectra.dl[k], float) for k in ("TT", "TE", "EE")}
    m_ell = chans.field_matrix(spec.channels, dl, ell, foreground)
    first, second = zip(*(chans.field_index(spec.channels, k, a, b) for k, a, b in spec.spectra_list))
    cov = cross_covariance(m_ell, first, second, ell, spec.fsky, spec.bin_width)
    noise = np.zeros(n)
    for c in spec.channels:
        nt = noise_dl(ell, c.noise_uK_arcmin, c.beam_fwhm_arcmin).reshape(spec.n_bins, spec.bin_width).mean(axis=1)
        auto = (c1 == c.name) & (c2 == c.name)
        factor = np.where(kind == "TT", 1.0, np.where(kind == "EE", c.pol_noise_factor ** 2, 0.0))
        noise[auto] = (nt[index] * factor)[auto]
    value = mean.copy()
    how = "no noise realisation"
    if realise:
        try:
            chol = np.linalg.cholesky(cov)
        except np.linalg.LinAlgError:
            raise UserError(f"{spec.path}: the covariance is not positive definite (zero signal and noise "
                            "in some band?)") from None
        value = value + chol @ np.random.default_rng(seed).standard_normal(n)
        how = f"Gaussian realisation, seed {seed}"
    return data.from_arrays(kind=kind, ell_lo=ell_lo, ell_hi=ell_hi, value=value, covariance=cov,
                            channel_1=c1, channel_2=c2, channels=draft.channels, beam_modes=draft.beam_modes,
                            noise=noise,
                            fiducial=mean, units="Dl_uK2", experiment=spec.name,
                            source=f"multi-frequency mock of experiment {spec.name!r} ({how})")
