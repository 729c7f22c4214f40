"""Simulated recordings of beating cardiomyocyte cultures with exact ground truth."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from beatlab._version import __version__
from beatlab.errors import ConfigError
from beatlab.synth._checks import as_generator, validate_arguments
from beatlab.synth._motion import (
    ContractionField,
    field_displacement,
    field_gradient,
    warp_scene,
)
from beatlab.synth._scene import place_clusters, render_scene
from beatlab.synth._schedule import evaluate_activation, make_schedule
from beatlab.synth._truth import TRUTH_DT_S, beat_truth, summarize_truth

__all__ = ["SyntheticRecording", "simulate_recording"]

#: Largest allowed ``max|a| * ||grad u||``: keeps the forward map invertible and the
#: fixed-point inversion fast.
_MAX_GRADIENT = 0.5


@dataclass(frozen=True)
class SyntheticRecording:
    """A simulated recording and its ground truth.

    Attributes
    ----------
    frames : ndarray (T, Y, X) float32
        OPD in nm (kind 'opd'), phase in rad ('phase', also for wrapped phase), or camera
        counts ('hologram').
    kind : str
        What ``frames`` holds as stored in the file: 'opd', 'phase' or 'hologram'.
    phase_wrapped : bool
        True when ``frames`` is phase wrapped to (-pi, pi].
    fps : float
        Frame rate in Hz.
    times_s : ndarray (T,)
        Frame times in s (``arange(T) / fps``).
    pixel_size_um : float
        Sample-plane pixel size in um.
    wavelength_nm : float
        Illumination wavelength in nm.
    opd_nm : ndarray (T, Y, X) float32
        The rendered OPD frames (with all OPD noise) that ``frames`` was converted from; the
        same array as ``frames`` for kind 'opd'.
    rest_opd_nm : ndarray (Y, X) float32
        The noise-free rest scene (no motion, no drift).
    mask : ndarray (Y, X) bool
        True cell mask at rest.
    cluster_labels : ndarray (Y, X) int
        Cluster (region) label 1..n of each cell pixel; 0 for background.
    displacement_field_um : ndarray (2, Y, X) float64
        Sum of the clusters' unit displacement fields (activation 1) at the rest pixel
        positions; component 0 along rows (y), 1 along columns (x), in um.
    activation : ndarray (T,) or (n_clusters, T) float64
        Activation per frame: 1-D when all clusters share one schedule without delay,
        otherwise one row per cluster.
    displacement_um : ndarray (T,) float64
        True primary trace per frame: mean over ``mask`` of ``|sum_c a_c(t) u_c(x)|`` in um
        (noise-free, stage drift excluded).
    region_displacement_um : ndarray (n_clusters, T) float64
        The same mean over each cluster's labelled region.
    stage_shift_um : ndarray (T, 2) float64
        Rigid stage shift ``(y, x)`` of the whole field per frame in um.
    reference_frames : ndarray (R, Y, X) float32 or None
        Sample-free hologram frames for kind 'hologram', else None.
    truth : dict
        JSON-ready ground truth (see :func:`simulate_recording`).
    """

    frames: np.ndarray
    kind: str
    phase_wrapped: bool
    fps: float
    times_s: np.ndarray
    pixel_size_um: float
    wavelength_nm: float
    opd_nm: np.ndarray
    rest_opd_nm: np.ndarray
    mask: np.ndarray
    cluster_labels: np.ndarray
    displacement_field_um: np.ndarray
    activation: np.ndarray
    displacement_um: np.ndarray
    region_displacement_um: np.ndarray
    stage_shift_um: np.ndarray
    reference_frames: np.ndarray | None
    truth: dict


def _correlated_unit_noise(shape, sigma_px, rng):
    """Gaussian-filtered white noise scaled to unit RMS (exact kernel norm)."""
    delta = np.zeros(shape)
    delta[shape[0] // 2, shape[1] // 2] = 1.0
    norm = np.sqrt(np.sum(ndimage.gaussian_filter(delta, sigma_px, mode="wrap") ** 2))
    return ndimage.gaussian_filter(rng.standard_normal(shape), sigma_px, mode="wrap") / norm


def simulate_recording(
    *,
    duration_s=10.0,
    fps=30.0,
    shape_px=None,
    pixel_size_um=None,
    wavelength_nm=632.8,
    layout="clusters",
    n_clusters=1,
    rate_bpm=60.0,
    beat_times_s=None,
    ibi_cv=0.0,
    cluster_rates_bpm=None,
    cluster_delay_s=0.0,
    first_beat_s=None,
    rise_s=0.15,
    relax_s=0.30,
    strain=0.03,
    contraction="isotropic",
    cluster_radius_um=None,
    amplitude_pattern=None,
    ead_beats=None,
    ead_level=0.5,
    overshoot=0.0,
    relaxation="cosine",
    relax_tau_s=0.13,
    ead_shape="step",
    ead_bump_sigma_s=0.045,
    ead_bump_delay_s=0.32,
    noise_nm=1.0,
    correlated_noise_nm=0.0,
    correlated_noise_um=2.0,
    jitter_nm=0.0,
    drift_nm=0.0,
    stage_drift_um=(0.0, 0.0),
    kind="opd",
    reference_count=4,
    rng,
):
    """Simulate a quantitative-phase time-lapse of a beating culture with exact ground truth.

    Parameters
    ----------
    duration_s : float
        Length in s; ``T = round(duration_s * fps)`` frames at ``t = arange(T) / fps``.
    fps : float
        Frame rate in Hz.
    shape_px : tuple of int, optional
        Frame shape ``(Y, X)`` in pixels. Default (128, 128); for holograms (256, 256), so
        that the off-axis reconstruction (about a fifth of the camera's pixels a side) keeps
        a grid fine enough for optical flow.
    pixel_size_um : float, optional
        Sample-plane pixel size in um. Default 0.5; for holograms 0.25 (the same 64 um field).
    wavelength_nm : float
        Illumination wavelength in nm (phase = OPD * 2 pi / wavelength).
    layout : {'clusters', 'confluent'}
        Compact clusters of elongated cells on a cell-free background (OPD 0), or a field
        fully covered by cells with ``n_clusters`` contraction centres.
    n_clusters : int
        Number of clusters (contraction centres); their field supports never overlap.
    rate_bpm : float
        Beating rate; 0 means no beating.
    beat_times_s : sequence of float, optional
        Explicit activation onsets (start of the rise) in s; overrides ``rate_bpm``; ``[]``
        means no beating.
    ibi_cv : float
        Coefficient of variation of log-normal intervals (0: regular).
    cluster_rates_bpm : sequence of float, optional
        One independent rate per cluster (each draws its own intervals).
    cluster_delay_s : float
        Cluster ``c`` (0-based) beats ``c * cluster_delay_s`` later (coupled propagation).
    first_beat_s : float, optional
        First activation onset; default ``0.5 * min(60 / rate, 2)`` s.
    rise_s : float
        Onset-to-peak time of the activation in s (half-cosine rise).
    relax_s : float
        Peak-to-rest time of one half-cosine relaxation step in s (with exponential relaxation
        it only sets the first fall of a step-shaped EAD).
    strain : float
        Fractional shortening inside a cluster's core at activation 1.
    contraction : {'isotropic', 'uniaxial'}
        Contraction toward the centre in all directions, or only along the cluster's cell axis.
    cluster_radius_um : float, optional
        Radius of a cell cluster (layout 'clusters').
    amplitude_pattern : sequence of float, optional
        Per-beat activation multipliers, cycled (``(1.0, 0.55)``: alternans).
    ead_beats : sequence of int, optional
        0-based beat indices that get an EAD-like after-contraction of shape ``ead_shape``.
    ead_level : float
        For ``ead_shape='step'``: the level of the secondary maximum as a fraction of the
        amplitude (0.3-0.9). For ``'bump'``: the height of the Gaussian, added to the relaxing
        activation, as a fraction of the amplitude (0-0.9).
    overshoot : float
        Relaxation past rest to ``-overshoot`` of the amplitude (cells lengthen briefly;
        ``|displacement|`` shows a small bump below 20 % of the amplitude: not an EAD).
        Half-cosine relaxation only.
    relaxation : {'cosine', 'exponential'}
        Shape of the final relaxation: a half-cosine fall over ``relax_s``, or an exponential
        decay ``exp(-t / relax_tau_s)`` from the peak (or from the step EAD's secondary
        maximum). The exponential peak is cornered: slope 0 before it, ``-1 / relax_tau_s``
        after it (times the amplitude).
    relax_tau_s : float
        Time constant of the exponential relaxation in s (``relaxation='exponential'``).
    ead_shape : {'step', 'bump'}
        EAD-like after-contraction: ``'step'`` relaxes to ``ead_level - 0.25``, re-rises to
        ``ead_level`` (half-cosines), then relaxes to rest; ``'bump'`` adds a smooth Gaussian
        of height ``ead_level`` and SD ``ead_bump_sigma_s`` centred ``ead_bump_delay_s`` after
        the end of the rise. Either way the truth's ``secondary_peak`` is decided on the
        noise-free trace by the design notes' definition, so a bump too small or too late to
        be a secondary peak is not one.
    ead_bump_sigma_s : float
        Standard deviation of the Gaussian bump in s.
    ead_bump_delay_s : float
        Time from the end of the rise (the peak of the activation) to the bump's centre in s.
    noise_nm : float
        RMS of per-pixel white OPD noise.
    correlated_noise_nm, correlated_noise_um : float
        RMS and Gaussian correlation length of spatially correlated noise, new every frame.
    jitter_nm : float
        RMS of a per-frame global OPD offset.
    drift_nm : float
        Slow background drift (offset plus tilt) growing linearly to at most ``drift_nm``.
    stage_drift_um : tuple of float
        Rigid translation ``(y, x)`` of the whole field, growing linearly to this value at the
        last frame; not contraction.
    kind : {'opd', 'phase', 'wrapped_phase', 'hologram'}
        Output quantity; holograms come from :func:`beatlab.holography.forward.render_hologram`.
    reference_count : int
        Number of sample-free hologram frames for kind 'hologram'.
    rng : numpy.random.Generator or int
        Source of all randomness (an int is a seed). Scene, schedule, noise and camera use
        independent child streams, so changing a noise level keeps the same cells and beats.

    Returns
    -------
    SyntheticRecording
        Frames plus the true mask, labels, unit field, activation and ``truth``: a JSON-ready
        dict with ``beats`` and ``summary`` of the whole-mask trace (None when clusters beat at
        independent rates), ``regions`` (label, area, centroid, beats, summary per cluster),
        ``schedules``, ``clusters`` and ``parameters``.

    Raises
    ------
    ConfigError
        An argument is out of range, clusters do not fit, or the field is too steep to invert.

    Notes
    -----
    Frames are rendered by inverting the forward map ``x = x0 + a u(x0) + s`` with a fixed-point
    iteration and sampling the rest scene at ``x0`` with cubic B-splines (Unser 1999, IEEE
    Signal Process Mag 16(6):22); OPD is divided by ``det(I + a grad u)`` so dry mass is
    conserved (Barer 1952, Nature 169:366: OPD integrates to dry mass). The truth uses the
    per-beat landmark definitions of the design notes on a dense (0.1 ms) noise-free trace
    ``D(t) = mean_mask |a(t) u(x)|``.

    Examples
    --------
    >>> sim = simulate_recording(duration_s=2.0, shape_px=(64, 64), rng=1)
    >>> sim.frames.shape, sim.truth["summary"]["beat_count"]
    ((60, 64, 64), 2)
    """
    given = dict(locals())
    given.pop("rng")
    hologram = kind == "hologram"
    if given["shape_px"] is None:
        given["shape_px"] = (256, 256) if hologram else (128, 128)
    if given["pixel_size_um"] is None:
        given["pixel_size_um"] = 0.25 if hologram else 0.5
    p = validate_arguments(given)
    seed = int(rng) if isinstance(rng, (int, np.integer)) and not isinstance(rng, bool) else None
    gen = as_generator(rng)
    rng_scene, rng_beats, rng_noise, rng_camera = gen.spawn(4)

    fps, px = p["fps"], p["pixel_size_um"]
    ny, nx = p["shape_px"]
    n_frames = round(p["duration_s"] * fps)
    times = np.arange(n_frames) / fps
    t_end = float(times[-1])
    n_cl = p["n_clusters"]

    geometry = place_clusters(
        p["layout"],
        n_cl,
        (ny * px, nx * px),
        cluster_radius_um=p["cluster_radius_um"],
        rng=rng_scene,
    )
    fields = [
        ContractionField(
            g.centre_um,
            g.core_um,
            g.outer_um,
            p["strain"],
            None
            if p["contraction"] == "isotropic"
            else (float(np.sin(g.angle_rad)), float(np.cos(g.angle_rad))),
        )
        for g in geometry
    ]
    schedules = make_schedule(
        n_clusters=n_cl,
        duration_s=p["duration_s"],
        rate_bpm=p["rate_bpm"],
        beat_times_s=p["beat_times_s"],
        ibi_cv=p["ibi_cv"],
        cluster_rates_bpm=p["cluster_rates_bpm"],
        cluster_delay_s=p["cluster_delay_s"],
        first_beat_s=p["first_beat_s"],
        rise_s=p["rise_s"],
        relax_s=p["relax_s"],
        amplitude_pattern=p["amplitude_pattern"],
        ead_beats=p["ead_beats"],
        ead_level=p["ead_level"],
        overshoot=p["overshoot"],
        rng=rng_beats,
        relaxation=p["relaxation"],
        relax_tau_s=p["relax_tau_s"],
        ead_shape=p["ead_shape"],
        ead_bump_sigma_s=p["ead_bump_sigma_s"],
        ead_bump_delay_s=p["ead_bump_delay_s"],
    )
    t_dense = np.linspace(0.0, t_end, round(t_end / TRUTH_DT_S) + 1)
    act_dense = np.array([evaluate_activation(t_dense, s) for s in schedules])
    act_frames = np.array([evaluate_activation(times, s) for s in schedules])
    a_max = max(float(np.max(np.abs(act_dense))), float(np.max(np.abs(act_frames))))

    stage_end = np.array(p["stage_drift_um"])
    stage = times[:, None] / t_end * stage_end[None, :]
    reach_um = float(np.hypot(*stage_end)) + a_max * p["strain"] * max(
        g.outer_um for g in geometry
    )
    pad = math.ceil(reach_um / px) + 8
    canvas = (ny + 2 * pad, nx + 2 * pad)
    scene, footprint = render_scene(
        p["layout"], geometry, canvas, pad_px=pad, pixel_size_um=px, rng=rng_scene
    )

    # the forward map must be invertible everywhere the inversion may look
    cy, cx = np.mgrid[0 : canvas[0] : 2, 0 : canvas[1] : 2].astype(float)
    g = field_gradient(fields, [1.0] * n_cl, (cy - pad) * px, (cx - pad) * px)
    gtg = np.stack([g[0] ** 2 + g[2] ** 2, g[0] * g[1] + g[2] * g[3], g[1] ** 2 + g[3] ** 2])
    lam = 0.5 * (gtg[0] + gtg[2]) + np.sqrt(0.25 * (gtg[0] - gtg[2]) ** 2 + gtg[1] ** 2)
    steep = a_max * float(np.sqrt(lam.max()))
    if steep > _MAX_GRADIENT:
        raise ConfigError(
            f"strain: {p['strain']!r} with peak activation {a_max:.3g} makes the displacement "
            f"gradient {steep:.3g} (limit {_MAX_GRADIENT}); pass a smaller strain or amplitude"
        )

    gy, gx = np.mgrid[0:ny, 0:nx].astype(np.float64) * px
    mask = footprint[pad : pad + ny, pad : pad + nx].copy()
    dist = np.stack([np.hypot(gy - f.centre_um[0], gx - f.centre_um[1]) for f in fields])
    labels = np.where(mask, np.argmin(dist, axis=0) + 1, 0).astype(np.int32)
    unit = [np.stack(field_displacement([f], [1.0], gy, gx)) for f in fields]
    unit_mag = np.array([np.hypot(u[0], u[1]) for u in unit])
    if np.any(np.count_nonzero(unit_mag > 0, axis=0) > 1):
        raise ConfigError("n_clusters: contraction fields overlap; use fewer clusters")
    field_um = np.sum(unit, axis=0)

    # true traces: |sum_c a_c u_c| = sum_c |a_c| |u_c| because the supports are disjoint
    n_mask = max(int(mask.sum()), 1)
    w_mask = unit_mag[:, mask].sum(axis=1) / n_mask
    d_dense = np.abs(act_dense).T @ w_mask
    d_frames = np.abs(act_frames).T @ w_mask
    region_w = []
    for c in range(n_cl):
        sel = labels == c + 1
        region_w.append(unit_mag[:, sel].sum(axis=1) / max(int(sel.sum()), 1))
    region_w = np.array(region_w)
    region_frames = region_w @ np.abs(act_frames)

    def trace_of(weights):
        def trace(t_s):
            tt = np.atleast_1d(np.asarray(t_s, dtype=float))
            acts = np.array([evaluate_activation(tt, s) for s in schedules])
            return float((weights @ np.abs(acts))[0])

        return trace

    shared = p["cluster_rates_bpm"] is None
    regions = []
    for c in range(n_cl):
        sel = labels == c + 1
        rows = beat_truth(
            t_dense,
            region_w[c] @ np.abs(act_dense),
            schedules[c].onsets_s,
            trace=trace_of(region_w[c]),
            edge_s=1.0 / p["fps"],
        )
        ys, xs = np.nonzero(sel)
        regions.append(
            {
                "label": c + 1,
                "area_px": int(sel.sum()),
                "centroid_px": [float(ys.mean()), float(xs.mean())] if ys.size else None,
                "centre_um": list(geometry[c].centre_um),
                "core_um": geometry[c].core_um,
                "outer_um": geometry[c].outer_um,
                "mean_unit_displacement_um": float(region_w[c, c]),
                "beats": rows,
                "summary": summarize_truth(rows, t_end_s=t_end),
            }
        )
    if shared:
        beats = beat_truth(
            t_dense,
            d_dense,
            schedules[0].onsets_s,
            trace=trace_of(w_mask),
            edge_s=1.0 / p["fps"],
        )
        summary = summarize_truth(beats, t_end_s=t_end)
    else:
        beats, summary = None, None

    # render
    coeffs = ndimage.spline_filter(scene, order=3)
    rest = scene[pad : pad + ny, pad : pad + nx]
    opd = np.empty((n_frames, ny, nx), dtype=np.float32)
    ramp_dir = rng_noise.uniform(0, 2 * np.pi)
    ramp = (gy - gy.mean()) * np.cos(ramp_dir) + (gx - gx.mean()) * np.sin(ramp_dir)
    ramp = ramp / np.abs(ramp).max()
    sigma_px = p["correlated_noise_um"] / px
    for i in range(n_frames):
        acts = act_frames[:, i]
        if not np.any(acts) and not np.any(stage[i]):
            frame = rest.copy()
        else:
            frame = warp_scene(
                coeffs, fields, acts, stage[i], grid_um=(gy, gx), pad_px=pad, pixel_size_um=px
            )
        if p["drift_nm"]:
            frame += p["drift_nm"] * times[i] / t_end * (0.7 + 0.3 * ramp)
        if p["noise_nm"]:
            frame += rng_noise.normal(0.0, p["noise_nm"], frame.shape)
        if p["correlated_noise_nm"]:
            frame += p["correlated_noise_nm"] * _correlated_unit_noise(
                frame.shape, sigma_px, rng_noise
            )
        if p["jitter_nm"]:
            frame += rng_noise.normal(0.0, p["jitter_nm"])
        opd[i] = frame

    wl = p["wavelength_nm"]
    reference = None
    if p["kind"] == "opd":
        frames, stored = opd, "opd"
    elif p["kind"] in ("phase", "wrapped_phase"):
        phase = opd.astype(np.float64) * (2.0 * np.pi / wl)
        if p["kind"] == "wrapped_phase":
            phase = np.angle(np.exp(1j * phase))
        frames, stored = phase.astype(np.float32), "phase"
    else:
        from beatlab.holography.forward import render_hologram, render_reference

        frames = np.stack(
            [render_hologram(f, wavelength_nm=wl, rng=rng_camera) for f in opd]
        ).astype(np.float32)
        reference = np.stack(
            [
                render_reference((ny, nx), wavelength_nm=wl, rng=rng_camera)
                for _ in range(int(p["reference_count"]))
            ]
        ).astype(np.float32)
        stored = "hologram"

    single = n_cl == 1 or (shared and p["cluster_delay_s"] == 0)
    parameters = {k: (list(v) if isinstance(v, tuple) else v) for k, v in p.items()}
    parameters["seed"] = seed
    truth = {
        "simulator": "beatlab.synth",
        "beatlab_version": __version__,
        "kind": stored,
        "phase_wrapped": p["kind"] == "wrapped_phase",
        "fps": fps,
        "pixel_size_um": px,
        "wavelength_nm": wl,
        "n_frames": n_frames,
        "shape_px": [ny, nx],
        "layout": p["layout"],
        "parameters": parameters,
        "mask_area_px": int(mask.sum()),
        "mean_unit_displacement_um": float(w_mask.sum()),
        "max_activation": a_max,
        "stage_drift_um": list(p["stage_drift_um"]),
        "schedules": [dict(label=c + 1, **s.to_dict()) for c, s in enumerate(schedules)],
        "beats": beats,
        "summary": summary,
        "regions": regions,
        "definitions": {
            "displacement_um": "mean over the true rest mask of |sum_c a_c(t) u_c(x0)| (um), "
            "noise-free, stage drift excluded",
            "beat_onsets": "schedule onsets are activation onsets (start of the rise)",
            "secondary_peak": "a local maximum of the noise-free trace between peak and end "
            "with prominence >= 10 % of the amplitude, standing above 20 % of the amplitude; "
            "schedules[].ead marks the beats given an after-contraction",
            "truth_dt_s": TRUTH_DT_S,
            "field_components": "displacement_field_um[0] along rows (y), [1] along columns (x)",
        },
    }
    return SyntheticRecording(
        frames=frames,
        kind=stored,
        phase_wrapped=p["kind"] == "wrapped_phase",
        fps=fps,
        times_s=times,
        pixel_size_um=px,
        wavelength_nm=wl,
        opd_nm=opd,
        rest_opd_nm=rest.astype(np.float32),
        mask=mask,
        cluster_labels=labels,
        displacement_field_um=field_um,
        activation=act_frames[0].copy() if single else act_frames,
        displacement_um=d_frames,
        region_displacement_um=region_frames,
        stage_shift_um=stage,
        reference_frames=reference,
        truth=truth,
    )
