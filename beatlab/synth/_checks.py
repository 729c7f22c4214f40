"""Validation of the simulator's public arguments (one-line errors naming the parameter)."""

from __future__ import annotations

import math

import numpy as np

from beatlab.errors import ConfigError
from beatlab.synth._scene import LAYOUTS
from beatlab.synth._schedule import EAD_SHAPES, RELAXATIONS

__all__ = ["CONTRACTIONS", "KINDS", "as_generator", "validate_arguments"]

KINDS = ("opd", "phase", "wrapped_phase", "hologram")
CONTRACTIONS = ("isotropic", "uniaxial")


def _bad(name, value, need, fix):
    return ConfigError(f"{name}: {need}, got {value!r}; {fix}")


def _check_number(name, value, *, lo=None, hi=None, lo_open=False, unit=""):
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise _bad(name, value, f"expected a number{unit}", "pass a finite number") from None
    ok = math.isfinite(v)
    if ok and lo is not None:
        ok = v > lo if lo_open else v >= lo
    if ok and hi is not None:
        ok = v <= hi
    if not ok:
        lo_s = "" if lo is None else (f"> {lo}" if lo_open else f">= {lo}")
        rng_s = " and ".join(s for s in (lo_s, "" if hi is None else f"<= {hi}") if s)
        raise _bad(name, value, f"must be {rng_s}{unit}", f"pass a value {rng_s}")
    return v


def validate_arguments(p):
    """Check the arguments of :func:`beatlab.synth.simulate_recording`.

    Parameters
    ----------
    p : dict
        Argument name to value, as passed (``rng`` excluded).

    Returns
    -------
    dict
        A new dict with numbers as float, sequences as tuples and ``shape_px`` as ints.

    Raises
    ------
    ConfigError
        One line naming the argument, the value received and the fix.
    """
    q = dict(p)
    q["duration_s"] = _check_number("duration_s", p["duration_s"], lo=0, lo_open=True, unit=" s")
    q["fps"] = _check_number("fps", p["fps"], lo=0, lo_open=True, unit=" Hz")
    n_frames = round(q["duration_s"] * q["fps"])
    if n_frames < 3:
        raise _bad("duration_s", p["duration_s"], "needs at least 3 frames", "record longer")
    shape = tuple(int(v) for v in np.atleast_1d(p["shape_px"]))
    if len(shape) != 2 or min(shape) < 16:
        raise _bad("shape_px", p["shape_px"], "expected (Y, X) >= 16 px", "pass e.g. (128, 128)")
    q["shape_px"] = shape
    for name in ("pixel_size_um", "wavelength_nm", "rise_s", "relax_s"):
        q[name] = _check_number(name, p[name], lo=0, lo_open=True)
    if p["layout"] not in LAYOUTS:
        raise _bad("layout", p["layout"], f"expected one of {LAYOUTS}", "pick one of those")
    if p["kind"] not in KINDS:
        raise _bad("kind", p["kind"], f"expected one of {KINDS}", "pick one of those")
    if p["contraction"] not in CONTRACTIONS:
        raise _bad(
            "contraction", p["contraction"], f"expected one of {CONTRACTIONS}", "pick one of those"
        )
    n = p["n_clusters"]
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
        raise _bad("n_clusters", n, "expected an integer >= 1", "pass e.g. 1")
    q["n_clusters"] = int(n)
    q["rate_bpm"] = _check_number("rate_bpm", p["rate_bpm"], lo=0, hi=600, unit=" bpm")
    q["ibi_cv"] = _check_number("ibi_cv", p["ibi_cv"], lo=0, hi=1)
    q["cluster_delay_s"] = _check_number("cluster_delay_s", p["cluster_delay_s"], lo=0, unit=" s")
    q["strain"] = _check_number("strain", p["strain"], lo=0, hi=0.25)
    q["overshoot"] = _check_number("overshoot", p["overshoot"], lo=0, hi=0.15)
    _check_beat_shape(p, q)
    for name in ("noise_nm", "correlated_noise_nm", "jitter_nm", "drift_nm"):
        q[name] = _check_number(name, p[name], lo=0, unit=" nm")
    q["correlated_noise_um"] = _check_number(
        "correlated_noise_um", p["correlated_noise_um"], lo=0, lo_open=True, unit=" um"
    )
    stage = np.asarray(p["stage_drift_um"], dtype=float)
    if stage.shape != (2,) or not np.all(np.isfinite(stage)):
        raise _bad("stage_drift_um", p["stage_drift_um"], "expected (dy, dx) in um", "pass 2")
    q["stage_drift_um"] = (float(stage[0]), float(stage[1]))
    if p["first_beat_s"] is not None:
        q["first_beat_s"] = _check_number("first_beat_s", p["first_beat_s"], lo=0, unit=" s")
    if p["cluster_radius_um"] is not None:
        q["cluster_radius_um"] = _check_number(
            "cluster_radius_um", p["cluster_radius_um"], lo=2, unit=" um"
        )
    rc = p["reference_count"]
    if isinstance(rc, bool) or not isinstance(rc, (int, np.integer)) or rc < 1:
        raise _bad("reference_count", rc, "expected an integer >= 1", "pass e.g. 4")

    if p["beat_times_s"] is not None:
        bt = np.asarray(p["beat_times_s"], dtype=float).ravel()
        if not np.all(np.isfinite(bt)) or np.any(bt < 0) or np.any(np.diff(bt) <= 0):
            raise _bad(
                "beat_times_s",
                p["beat_times_s"],
                "expected increasing onset times >= 0 s",
                "sort them and drop duplicates",
            )
        if p["ibi_cv"] or p["cluster_rates_bpm"] is not None:
            raise ConfigError(
                "beat_times_s: explicit beat times exclude ibi_cv and cluster_rates_bpm; "
                "pass either explicit times or rates"
            )
        q["beat_times_s"] = tuple(float(v) for v in bt)
    if p["cluster_rates_bpm"] is not None:
        rates = tuple(float(v) for v in np.atleast_1d(p["cluster_rates_bpm"]))
        if len(rates) != q["n_clusters"] or not all(math.isfinite(r) and r >= 0 for r in rates):
            raise _bad(
                "cluster_rates_bpm",
                p["cluster_rates_bpm"],
                f"expected {q['n_clusters']} rates >= 0 bpm (one per cluster)",
                "pass one rate per cluster",
            )
        q["cluster_rates_bpm"] = rates
    if p["amplitude_pattern"] is not None:
        pat = tuple(float(v) for v in np.atleast_1d(p["amplitude_pattern"]))
        if not pat or not all(math.isfinite(v) and 0 < v <= 3 for v in pat):
            raise _bad(
                "amplitude_pattern",
                p["amplitude_pattern"],
                "expected multipliers in (0, 3]",
                "pass e.g. (1.0, 0.55)",
            )
        q["amplitude_pattern"] = pat
    if p["ead_beats"] is not None:
        eb = tuple(int(v) for v in np.atleast_1d(p["ead_beats"]))
        if any(v < 0 for v in eb):
            raise _bad("ead_beats", p["ead_beats"], "expected 0-based beat indices", "use >= 0")
        q["ead_beats"] = eb
    return q


def _check_beat_shape(p, q):
    """Relaxation and EAD shape arguments, checked into ``q``."""
    for name, choices in (("relaxation", RELAXATIONS), ("ead_shape", EAD_SHAPES)):
        if p[name] not in choices:
            raise _bad(name, p[name], f"expected one of {choices}", "pick one of those")
    for name in ("relax_tau_s", "ead_bump_sigma_s"):
        q[name] = _check_number(name, p[name], lo=0, lo_open=True, unit=" s")
    q["ead_bump_delay_s"] = _check_number(
        "ead_bump_delay_s", p["ead_bump_delay_s"], lo=0, unit=" s"
    )
    if p["ead_shape"] == "bump":
        q["ead_level"] = _check_number("ead_level", p["ead_level"], lo=0, lo_open=True, hi=0.9)
    else:
        q["ead_level"] = _check_number("ead_level", p["ead_level"], lo=0.3, hi=0.9)
    if p["relaxation"] == "exponential" and q["overshoot"] > 0:
        raise ConfigError(
            f"overshoot: {p['overshoot']!r} needs relaxation='cosine' (an exponential tail "
            "never passes rest); pass overshoot=0 or relaxation='cosine'"
        )


def as_generator(rng):
    """Return ``rng`` if it is a ``numpy.random.Generator``, else a generator seeded by the int.

    Raises
    ------
    ConfigError
        ``rng`` is neither.
    """
    if isinstance(rng, np.random.Generator):
        return rng
    if isinstance(rng, (int, np.integer)) and not isinstance(rng, bool):
        return np.random.default_rng(int(rng))
    raise ConfigError(
        f"rng: expected a numpy.random.Generator or an int seed, got {type(rng).__name__}; "
        "pass rng=np.random.default_rng(seed)"
    )
