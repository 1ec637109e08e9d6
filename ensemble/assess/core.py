"""Clock assessment of an archive: the evidence for each clock and its advisory verdict.

:func:`assess_archive` reads an archive written by ``ensemble run`` and, for every clock:

1. its own Allan (linear drift removed) and Hadamard deviation with confidence intervals,
   separated from its pair differences by the N-cornered hat -- so the scale's noise does not
   enter (:mod:`.ownstability`);
2. the clock model (white PM, white FM, flicker floor, random-walk FM) fitted to its own
   Hadamard variance, with uncertainties;
3. its frequency and drift relative to the scale, from a Kalman filter of its offsets with
   noise-aware uncertainties (:mod:`.tracking`);
4. its record: anomalies by kind and size, weight, standings, data availability (:mod:`.history`);
5. ageing: white-FM level and drift in sliding windows and their trend tests (:mod:`.windows`);
6. holdover: the 95 % bound of its time error if it had to carry time alone, and how long it
   stays within each budget (:mod:`.holdover`);
7. optionally (``what_if=True``) the scale re-formed without it, and the change of the scale's
   estimated stability (:mod:`.whatif`, :mod:`.scalestab`);
8. the verdict and its reasons (:mod:`.verdict`).
"""

from __future__ import annotations

import dataclasses
import math
import tomllib
import warnings

import numpy as np

from ..config import Config, load_config, parse_config
from ..errors import InputError
from ..io.measurements import Measurements
from ..model.clockmodel import ClockNoise
from ..model.presets import PRESETS, expected_hdev
from ..stability.fit import FLICKER_AVAR, fit_noise
from ..stability.grid import on_grid
from ..units import SECONDS_PER_DAY
from .history import clean_offsets, clock_histories
from .holdover import holdover_time, predict_time_error
from .ownstability import own_stability
from .records import (Assessment, ClockAssessment, Deviation, Holdover, NoiseLevels, WhatIf)
from .scalestab import difference_std, scale_variance
from .settings import AssessmentSettings
from .tracking import offset_noise, track_offsets
from .verdict import decide, what_if_role
from .whatif import ReformedScale, detrend_quadratic, reform_scales, scale_weights
from .windows import ageing, window_layout

__all__ = ["assess_archive", "assess", "read_archive", "merged_config", "ArchiveInputs"]

#: Fewest epochs an archive needs to be assessed.
MIN_EPOCHS = 16
#: The span must hold this many averaging times for a tau to be judged or fitted.
SPAN_PER_TAU = 4
#: Holdover times at which the bound is reported. [s]
HOLDOVER_REPORT_S = (SECONDS_PER_DAY, 10 * SECONDS_PER_DAY, 30 * SECONDS_PER_DAY)


@dataclasses.dataclass(frozen=True, eq=False)
class ArchiveInputs:
    """What the assessment reads from an archive (SI units; arrays (T, N) in clock order)."""

    path: str
    clocks: tuple
    mjd: np.ndarray
    elapsed_s: np.ndarray
    tau0_s: float
    offset_s: np.ndarray
    weight: np.ndarray
    state: np.ndarray
    phase_s: np.ndarray
    reference: np.ndarray
    events: object
    config: Config
    one_run: bool = True

    def measurements(self) -> Measurements:
        """The archive's measurements, to re-form the scale."""
        return Measurements(self.clocks, self.mjd.copy(), self.elapsed_s.copy(),
                            self.phase_s.copy(), self.reference.astype(np.intp), self.tau0_s,
                            source=self.path)


def read_archive(path) -> ArchiveInputs:
    """Read the datasets the assessment needs (InputError if the archive lacks them)."""
    from ..archive import open_archive

    path = str(path)
    with open_archive(path) as a:
        needed = ("/measurements/phase", "/measurements/reference", "/measurements/elapsed")
        missing = [p for p in needed if p not in a.datasets]
        if missing:
            raise InputError(f"the archive has no {', '.join(missing)}: it was not written by "
                             f"'ensemble run' of this version; re-run it to assess the clocks",
                             path=path)
        mjd = np.asarray(a.mjd, dtype=float)
        if mjd.size < MIN_EPOCHS:
            raise InputError(f"the archive holds {mjd.size} epochs; assessing the clocks needs "
                             f"at least {MIN_EPOCHS}", path=path)
        text = a.config_toml
        try:
            cfg = parse_config(tomllib.loads(text), source=f"{path} (config_toml)")
        except tomllib.TOMLDecodeError as exc:
            raise InputError(f"the archive's config_toml is not valid TOML: {exc}",
                             path=path) from None
        elapsed = np.asarray(a.array("/measurements/elapsed"), dtype=float)
        inputs = ArchiveInputs(
            path=path, clocks=tuple(a.clocks), mjd=mjd, elapsed_s=elapsed,
            tau0_s=float(np.median(np.diff(elapsed))),
            offset_s=np.asarray(a.offset.to_numpy(), dtype=float),
            weight=np.asarray(a.weight.to_numpy(), dtype=float),
            state=np.asarray(a.state.to_numpy()),
            phase_s=np.asarray(a.array("/measurements/phase"), dtype=float),
            reference=np.asarray(a.array("/measurements/reference")),
            events=a.events, config=cfg, one_run=_formed_as_one_run(a.provenance))
    return inputs


def _formed_as_one_run(provenance) -> bool:
    """Whether the archive's scale is what one run over all its data gives: every run that
    wrote epochs used the same configuration (an append with the same configuration equals one
    run, docs/engine.md section 6; assessment-only records do not count)."""
    if not len(provenance):
        return True
    runs = provenance[provenance["mode"].isin(["create", "append"])]
    return int(runs["config_sha256"].nunique()) <= 1


def merged_config(archive_cfg: Config, override: Config | None) -> Config:
    """The archive's configuration with [assessment] and the clock types of ``override``.

    The engine settings always stay the archive's, so that a what-if re-forms the scale as the
    archive was formed.
    """
    if override is None:
        return archive_cfg
    sections = dict(archive_cfg.sections)
    if "assessment" in override.sections:
        sections["assessment"] = override.sections["assessment"]
    clocks = dict(archive_cfg.clocks)
    for name, given in override.clocks.items():
        clocks[name] = dataclasses.replace(archive_cfg.clock(name), type=given.type)
    return Config(sections, clocks, archive_cfg.source)


def assess_archive(path, settings: AssessmentSettings | None = None, *, what_if: bool = False,
                   config=None, progress: bool = False) -> Assessment:
    """Assess every clock of an archive.

    Parameters
    ----------
    path : path-like
        Archive written by ``ensemble run``.
    settings : AssessmentSettings, optional
        Thresholds and choices; default: the [assessment] section of ``config``, else of the
        archive's configuration.
    what_if : bool
        Re-form the scale without each member clock (slower: one ensemble run per clock, in
        parallel).
    config : Config or path-like, optional
        Configuration whose [assessment] section and [clocks.NAME] types replace the
        archive's (the engine settings stay the archive's).
    progress : bool
        Progress bar for the what-if runs (on a terminal only).

    Returns
    -------
    Assessment

    Raises
    ------
    InputError
        Not an archive, too short, or written without the measurements.
    ConfigError
        An invalid configuration file.
    """
    inputs = read_archive(path)
    override = config if isinstance(config, Config) or config is None else load_config(config)
    cfg = merged_config(inputs.config, override)
    if settings is None:
        settings = cfg.sections.get("assessment") or AssessmentSettings()
    return assess(inputs, cfg, settings, what_if=what_if, progress=progress)


def _grid(n_t: int, tau0_s: float, taus) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Octave factors and the judged factors the span supports; (grid m, judged m, their
    columns in the grid)."""
    m_max = max(1, (n_t - 1) // SPAN_PER_TAU)
    octave = 2 ** np.arange(int(math.log2(m_max)) + 1)
    judged = sorted({max(1, int(round(t / tau0_s))) for t in taus})
    judged = np.array([m for m in judged if SPAN_PER_TAU * m <= n_t - 1], dtype=int)
    grid = np.union1d(octave, judged).astype(int)
    cols = np.searchsorted(grid, judged)
    return grid, judged, cols


def assess(inputs: ArchiveInputs, cfg: Config, settings: AssessmentSettings, *,
           what_if: bool = False, progress: bool = False) -> Assessment:
    """Assess the clocks of archive data already read (see :func:`assess_archive`)."""
    s = settings
    clocks, tau0 = inputs.clocks, inputs.tau0_s
    n_t, n_c = inputs.offset_s.shape
    span_days = float(inputs.elapsed_s[-1] - inputs.elapsed_s[0]) / SECONDS_PER_DAY
    messages: list[str] = []
    hist = clock_histories(clocks, inputs.mjd, np.full(n_t, tau0), inputs.phase_s,
                           inputs.weight, inputs.state, inputs.events)
    clean = clean_offsets(inputs.offset_s, inputs.mjd, clocks, inputs.events)
    _, misfit, (clean_g,) = on_grid(inputs.elapsed_s, tau0, clean)
    n_k = clean_g.shape[0]
    elapsed_g = inputs.elapsed_s[0] + tau0 * np.arange(n_k)
    mjd_g = np.interp(elapsed_g, inputs.elapsed_s, inputs.mjd)
    if misfit > 0.01:
        messages.append(f"epochs lie up to {misfit:.2g} sampling intervals off the regular "
                        f"grid; the stability statistics use the nearest grid slot")
    if n_k > n_t:
        messages.append(f"{n_k - n_t} epochs of the {n_k}-slot grid have no row; the "
                        f"statistics skip every difference that spans one")
    grid, judged, cols = _grid(n_k, tau0, s.taus)
    if not judged.size:
        messages.append(f"the {span_days:.1f}-day span supports none of the averaging times "
                        f"{', '.join(f'{t:g} s' for t in s.taus)} (each needs "
                        f"{SPAN_PER_TAU} of them in the span)")
    tau_j = judged * tau0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        had = own_stability(clean_g, tau0, grid, "hadamard", clocks=clocks,
                            confidence=s.confidence)
        flat = detrend_quadratic(clean_g, elapsed_g)
        allan = own_stability(flat, tau0, grid, "allan", clocks=clocks,
                              confidence=s.confidence)
    roles = [_role(cfg, c) for c in clocks]
    drift_state = np.array([_drift_state(cfg, c) for c in clocks])
    noise_off = offset_noise(clean_g, tau0, span_days * SECONDS_PER_DAY)
    track = track_offsets(inputs.elapsed_s, clean, noise_off, drift_state)
    fits = [_fit(had, i) for i in range(n_c)]
    layout = window_layout(mjd_g, elapsed_g, s.window_days, s.window_step_days,
                           s.min_windows, s.min_window_days)
    alpha_by_m = {int(mk): had.alpha[:, k] for k, mk in enumerate(grid)}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        age = ageing(clean_g, elapsed_g, tau0, layout, clocks=clocks,
                     offset_noise=noise_off, drift_state=drift_state, alpha_by_m=alpha_by_m,
                     trend_alpha=s.trend_alpha, confidence=s.confidence,
                     white_pm_s2=np.array([f.r_s2 if f is not None else 0.0 for f in fits]))
    messages.append(f"ageing windows: {layout.note}")
    messages.extend(age.messages)
    mean_w = np.mean(inputs.weight, axis=0)
    eff_a, eff_h = scale_weights(clean, inputs.elapsed_s, tau0, grid, mean_w)
    scale = _scale_curves(eff_a, eff_h, allan, had)
    types = [_type_for(cfg.clock(c).type, s, had, fits[i], i) for i, c in enumerate(clocks)]
    whatifs = _what_if(inputs, cfg, s, roles, mean_w, judged, cols, allan, messages,
                       progress, eff_a) if what_if else {}
    records = []
    for i, name in enumerate(clocks):
        fit = fits[i]
        white_pm = math.sqrt(fit.r_s2) if fit is not None else 0.0
        typical = (expected_hdev(types[i], tau_j, white_pm_s=white_pm) if types[i]
                   else np.full(tau_j.size, np.nan))
        rec = ClockAssessment(
            clock=name, verdict="keep", reasons=(), repair_suggested=False, role=roles[i],
            type_configured=cfg.clock(name).type, type_compared=types[i],
            adev=_deviation(allan, i, cols), hdev=_deviation(had, i, cols),
            hdev_typical=np.asarray(typical, dtype=float), noise=fit,
            frequency=float(track.frequency[i]), frequency_std=float(track.frequency_std[i]),
            drift_per_day=float(track.drift_per_s[i] * SECONDS_PER_DAY),
            drift_std_per_day=float(track.drift_std_per_s[i] * SECONDS_PER_DAY),
            history=hist[i], white_fm_trend=age.white_fm_trend[i],
            drift_trend=age.drift_trend[i], white_fm_growth=float(age.growth_factor[i]),
            holdover=_holdover(track, i, fit, s), what_if=whatifs.get(name))
        verdict, reasons, repair = decide(rec, tau_j, span_days, s, s.confidence)
        records.append(dataclasses.replace(rec, verdict=verdict, reasons=reasons,
                                           repair_suggested=repair))
    unresolved = [c for i, c in enumerate(clocks) if cols.size and not had.resolved[i, cols].any()]
    if unresolved:
        messages.append(f"not separable by the N-cornered hat at any judged averaging time: "
                        f"{', '.join(unresolved)} (upper bounds reported; fits and the scale's "
                        f"stability use half of the quietest pair for them)")
    details = {"grid_m": grid, "grid_tau_s": grid * tau0, "judged_columns": cols,
               "own_allan": allan, "own_hadamard": had, "track": track, "ageing": age,
               "scale_grid": scale, "effective_allan": eff_a, "effective_hadamard": eff_h,
               "span_days": span_days, "config_toml": cfg.to_toml()}
    pick = (lambda v: v[cols]) if cols.size else (lambda v: np.zeros(0))
    return Assessment(
        archive=inputs.path, clocks=clocks, first_mjd=float(inputs.mjd[0]),
        last_mjd=float(inputs.mjd[-1]), tau0_s=tau0, tau_s=tau_j, confidence=s.confidence,
        records=tuple(records), scale_adev=pick(scale["adev"]),
        scale_adev_std=pick(scale["adev_std"]), scale_hdev=pick(scale["hdev"]),
        scale_hdev_std=pick(scale["hdev_std"]), what_if=bool(what_if), windows=layout.note,
        messages=tuple(messages), details=details)


def _role(cfg: Config, name: str) -> str:
    """The clock's role; a measured steered output is a monitor, as in the run."""
    st = cfg.sections.get("steering")
    if st is not None and st.output == "measured" and st.output_channel == name:
        return "monitor"
    return cfg.clock(name).role


def _drift_state(cfg: Config, name: str) -> bool:
    c = cfg.clock(name)
    return cfg.ensemble.drift_states if c.drift_state == "default" else c.drift_state == "yes"


def _deviation(own, i: int, cols: np.ndarray) -> Deviation:
    return Deviation(value=own.deviation[i, cols], lo=own.lo[i, cols], hi=own.hi[i, cols],
                     edf=own.edf[i, cols], resolved=own.resolved[i, cols],
                     upper_bound=own.upper_bound[i, cols])


def _fit(own, i: int) -> NoiseLevels | None:
    """Fit to the resolved points; where fewer than four are resolved, to the working values
    (then ``assumed`` is True)."""
    v, e = own.working[i], own.working_edf[i]
    ok = np.isfinite(v) & (v > 0) & np.isfinite(e) & (e > 0)
    resolved = ok & own.resolved[i]
    if resolved.sum() >= 4:
        ok = resolved
    if ok.sum() < 4:
        return None
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            fit = fit_noise(own.tau_s[ok], v[ok], np.maximum(e[ok], 1.0), kind="hadamard",
                            terms=("r", "q1", "q2", "flicker"))
    except ValueError:
        return None
    h1, h1s = fit.flicker_h_minus1, fit.flicker_h_minus1_std
    adev_f = math.sqrt(FLICKER_AVAR * h1)
    # d sqrt(2 ln2 h) / dh = 2 ln2 / (2 sqrt(2 ln2 h)); at h = 0 the bound sqrt(2 ln2 std)
    f_std = (FLICKER_AVAR * h1s / (2.0 * adev_f) if adev_f > 0
             else math.sqrt(FLICKER_AVAR * h1s) if np.isfinite(h1s) else math.nan)
    return NoiseLevels(q1_s=fit.noise.q1_s, q1_std_s=fit.q1_std_s,
                       white_fm_adev_1s=math.sqrt(fit.noise.q1_s), flicker_adev=adev_f,
                       flicker_adev_std=float(f_std), q2_per_s=fit.noise.q2_per_s,
                       q2_std_per_s=fit.q2_std_per_s, r_s2=fit.noise.r_s2,
                       r_std_s2=fit.r_std_s2, assumed=bool(np.any(~own.resolved[i, ok])),
                       chi2=float(fit.chi2), dof=int(fit.dof))


def _type_for(configured: str, s: AssessmentSettings, had, fit, i: int) -> str | None:
    """The preset the clock is compared with: its configured type, or for "auto" the preset
    whose typical Hadamard deviation is closest (least mean squared log ratio over the
    resolved averaging times, or over the working values where none is resolved), or none
    (auto_type = "skip")."""
    if configured in PRESETS:
        return configured
    if s.auto_type == "skip":
        return None
    ok = had.resolved[i] & np.isfinite(had.deviation[i])
    dev = had.deviation[i]
    if ok.sum() < 2:                      # nothing resolved: the working values
        dev = np.sqrt(had.working[i])
        ok = np.isfinite(dev) & (dev > 0)
        if ok.sum() < 2:
            return None
    white_pm = math.sqrt(fit.r_s2) if fit is not None else 0.0
    tau, dev = had.tau_s[ok], dev[ok]
    score = {key: float(np.mean(np.log(dev / expected_hdev(key, tau, white_pm_s=white_pm)) ** 2))
             for key in PRESETS}
    return min(score, key=score.get)


def _holdover(track, i: int, fit: NoiseLevels | None, s: AssessmentSettings) -> Holdover | None:
    from scipy.stats import norm

    if fit is None or not np.all(np.isfinite(track.covariance[i])):
        return None
    n = 3 if track.drift_state[i] else 2
    p0 = track.covariance[i][:n, :n]
    noise = ClockNoise(q1_s=fit.q1_s, q2_per_s=fit.q2_per_s)
    k = float(norm.ppf(0.5 * (1.0 + s.holdover_coverage)))
    horizon = s.holdover_horizon_days * SECONDS_PER_DAY
    times = holdover_time(np.zeros(n), p0, noise, s.budgets_s, k=k, horizon_s=horizon,
                          flicker_adev=fit.flicker_adev)
    pred = predict_time_error(np.zeros(n), p0, noise, np.array(HOLDOVER_REPORT_S), k=k,
                              flicker_adev=fit.flicker_adev)
    return Holdover(budgets_s=tuple(s.budgets_s), time_to_budget_s=tuple(float(t) for t in times),
                    horizon_s=horizon,
                    bound_s={t: float(b) for t, b in zip(HOLDOVER_REPORT_S, pred.bound_s)},
                    coverage=float(s.holdover_coverage))


def _scale_curves(eff_a, eff_h, allan, had) -> dict:
    n = allan.tau_s.size
    out = {}
    for key, eff, own in (("adev", eff_a, allan), ("hdev", eff_h, had)):
        if eff is None:
            out[key] = np.full(n, np.nan)
            out[key + "_std"] = np.full(n, np.nan)
            continue
        var, std = scale_variance(eff, own.working, own.covariance)
        with np.errstate(invalid="ignore"):
            dev = np.where(var > 0, np.sqrt(np.where(var > 0, var, 1.0)), np.nan)
            out[key] = dev
            out[key + "_std"] = np.where(var > 0, std / (2.0 * np.where(var > 0, dev, 1.0)),
                                         np.nan)
    return out


def _what_if(inputs, cfg, s, roles, mean_w, judged, cols, allan, messages, progress,
             eff_archive) -> dict:
    """Leave-one-out: the scale's estimated Allan deviation without each weighted member.

    An archive formed as one run would form it (one run, or appends with the same
    configuration) serves as the full scale; otherwise the full scale is re-formed in one run,
    like the leave-one-out scales, so that every comparison is like with like.
    """
    candidates = [c for c, role, w in zip(inputs.clocks, roles, mean_w)
                  if role == "member" and w > 0]
    if not judged.size or not candidates:
        messages.append("what-if skipped: no judged averaging time or no weighted member clock")
        return {}
    single = inputs.one_run and eff_archive is not None
    runs = reform_scales(inputs.measurements(), cfg, candidates, judged,
                         workers=s.what_if_workers, progress=progress, full=not single)
    nan = np.full(judged.size, np.nan)
    if single:
        full = ReformedScale(None, _columns(eff_archive, cols), None, mean_w)
    else:
        full = runs[None]
    if full.error or full.allan is None:
        messages.append(f"what-if failed: the full scale could not be re-formed "
                        f"({full.error or 'no weighted clock'})")
        return {c: WhatIf(nan, nan, nan, "minor", full.error or "no weighted clock")
                for c in candidates}
    diff_w = float(np.max(np.abs(full.mean_weight - mean_w)))
    if not single and diff_w > 1e-6:
        messages.append(f"what-if: the scale re-formed in one run differs from the archive's "
                        f"(mean weights by up to {diff_w:.2g}; its runs used different "
                        f"configurations); each comparison uses the re-formed full scale")
    work, cov = allan.working[:, cols], allan.covariance[cols]
    v_full, _ = scale_variance(full.allan, work, cov)
    out = {}
    for name in candidates:
        run = runs[name]
        if run.error or run.allan is None:
            out[name] = WhatIf(nan, nan, nan, "minor", run.error or "no weighted clock left")
            messages.append(f"what-if without {name} failed: {out[name].error}")
            continue
        v_k, _ = scale_variance(run.allan, work, cov)
        d_std = difference_std(full.allan, run.allan, cov)
        with np.errstate(invalid="ignore", divide="ignore"):
            change = np.sqrt(v_k / v_full) - 1.0
            change_std = 0.5 * d_std / v_full
            dev_k = np.sqrt(np.where(v_k > 0, v_k, np.nan))
        out[name] = WhatIf(change, change_std, dev_k, what_if_role(change, change_std, s))
    return out


def _columns(eff, cols):
    """EffectiveWeights restricted to some averaging-factor columns."""
    return dataclasses.replace(eff, m=eff.m[cols], weights=eff.weights[cols],
                               remainder_variance=eff.remainder_variance[cols],
                               explained=eff.explained[cols], n_terms=eff.n_terms[cols])
