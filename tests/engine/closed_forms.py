"""Helpers of the closed-form checks (tests/engine/test_closed_forms_*.py): renders as per-pixel
means with their standard errors, the pinhole camera's rays written out again in numpy, ray–sphere
hits, and the textbook formulas the renders are compared with.

Nothing here calls the engine's own optics: Fresnel, Schlick and GGX are written again from their
published forms, so a wrong engine formula cannot also make the expected value wrong.
"""

from __future__ import annotations

import math

import numpy as np


def render(shot):
    """Render frame 1 of a shot in this process: (mean (h, w, 3), standard error of the mean
    (h, w, 3), the Film), the error from the render's own per-pixel sample variance."""
    from lampyr.engine.render import render_frame

    film = render_frame(shot, 1)
    return film.mean(), film.std_error(), film


# ------------------------------------------------------------------------------- the camera

def pinhole_rays(width, height, position, target, up, fov_deg, sub):
    """Unit directions (height, width, sub, sub, 3) of pinhole rays through a sub × sub grid of
    points in every pixel (midpoints of the grid's cells), for the camera the shot file describes
    (docs/shot-file.md: vertical field of view `fov`, rows top to bottom, columns left to right,
    `up` the image's up). The standard look-at pinhole model: forward w, right r = w × up,
    true up v = r × w; raster point (x, y) looks along w + sx r + sy v with
    sx = (2x/width − 1) tan(fov/2) · width/height, sy = (1 − 2y/height) tan(fov/2)."""
    p, t, u = (np.asarray(a, float) for a in (position, target, up))
    w = (t - p) / np.linalg.norm(t - p)
    r = np.cross(w, u)
    r /= np.linalg.norm(r)
    v = np.cross(r, w)
    tan_half = math.tan(math.radians(fov_deg) / 2)
    off = (np.arange(sub) + 0.5) / sub
    fx = (np.arange(width)[:, None] + off[None, :])  # (width, sub)
    fy = (np.arange(height)[:, None] + off[None, :])  # (height, sub)
    sx = (2 * fx / width - 1) * tan_half * width / height
    sy = (1 - 2 * fy / height) * tan_half
    # axes: (row, column, sub-row, sub-column)
    sxb = sx[None, :, None, :]
    syb = sy[:, None, :, None]
    d = w + sxb[..., None] * r + syb[..., None] * v
    d = np.broadcast_to(d, (height, width, sub, sub, 3))
    return d / np.linalg.norm(d, axis=-1, keepdims=True)


def sphere_hit_cosine(origin, dirs, centre, radius):
    """Cosine of the angle of incidence, −d·n, where each ray from `origin` first meets the sphere
    (the outside), and NaN where it misses (the elementary ray–sphere quadratic)."""
    oc = np.asarray(origin, float) - np.asarray(centre, float)
    b = dirs @ oc
    c = oc @ oc - radius * radius
    disc = b * b - c
    t = -b - np.sqrt(np.where(disc > 0, disc, np.nan))
    hit = np.asarray(origin, float) + t[..., None] * dirs
    n = (hit - np.asarray(centre, float)) / radius
    return -np.sum(dirs * n, axis=-1)


def pixel_average(values):
    """Mean over the sub-pixel grid: (h, w, sub, sub, ...) -> (h, w, ...)."""
    return values.mean(axis=(2, 3))


def sphere_view_expected(size, eye, fov, le, first, within, n):
    """What a size × size pinhole camera at `eye`, looking at the origin with +y up, sees of a unit
    sphere there in a uniform environment of radiance le: per pixel the expected radiance
    (h, w, 3) on a 32 × 32 sub-pixel grid, that grid's error (its change from a 16 × 16 grid),
    and the standard error of an n-sample pixel mean predicted from the model.

    One sample's value is le · X where its ray meets the sphere at cos θ, with E[X] = first(cos θ)
    and Var[X] = within(cos θ) ((..., 1) or (..., 3) arrays), and le where it sees the
    environment. The variance of a sample is the mean of `within` plus the variance of E[X] over
    the pixel (the law of total variance), computed from deviations so that it keeps its
    precision when it is tiny."""
    out = []
    for sub in (16, 32):
        d = pinhole_rays(size, size, eye, (0.0, 0.0, 0.0), (0.0, 1.0, 0.0), fov, sub)
        cos = sphere_hit_cosine(eye, d, (0.0, 0.0, 0.0), 1.0)
        miss = np.isnan(cos)[..., None]
        c = np.nan_to_num(cos, nan=1.0)
        value = np.where(miss, le, le * first(c))
        mean = pixel_average(value)
        var = pixel_average(np.where(miss, 0.0, le * le * within(c)))
        var = var + pixel_average((value - mean[:, :, None, None]) ** 2)
        out.append((mean, var))
    (coarse, _), (fine, fine_var) = out
    return fine, np.abs(fine - coarse), np.sqrt(fine_var / n)


# ------------------------------------------------------------------------------- Fresnel

def fresnel_hecht(cos_i, n1, n2):
    """Unpolarised reflectance of a smooth dielectric interface, light going from index n1 into
    n2 at angle of incidence θi = acos(cos_i): R = (Rs + Rp) / 2 with Fresnel's sine and tangent
    laws r_s = −sin(θi − θt) / sin(θi + θt), r_p = tan(θi − θt) / tan(θi + θt) (Hecht, *Optics*,
    §4.6, eqs. 4.42-4.43, numbers from memory), θt from Snell's law; at normal incidence the
    limit ((n1 − n2)/(n1 + n2))²; 1 past the critical angle (total internal reflection)."""
    cos_i = np.clip(np.asarray(cos_i, float), 0.0, 1.0)
    ti = np.arccos(cos_i)
    s = n1 / n2 * np.sin(ti)
    tir = s >= 1.0
    tt = np.arcsin(np.where(tir, 0.0, s))
    normal = ti < 1e-6
    with np.errstate(divide="ignore", invalid="ignore"):
        rs = np.sin(ti - tt) / np.sin(ti + tt)
        rp = np.tan(ti - tt) / np.tan(ti + tt)
        r = 0.5 * (rs * rs + rp * rp)
    r = np.where(normal, ((n1 - n2) / (n1 + n2)) ** 2, r)
    return np.where(tir, 1.0, r)


def fresnel_hecht_sp(cos_i, n1, n2):
    """(Rs, Rp) separately, by the same laws as `fresnel_hecht` (no total internal reflection)."""
    ti = np.arccos(np.clip(np.asarray(cos_i, float), 0.0, 1.0))
    tt = np.arcsin(n1 / n2 * np.sin(ti))
    small = ti < 1e-6
    with np.errstate(divide="ignore", invalid="ignore"):
        rs = (np.sin(ti - tt) / np.sin(ti + tt)) ** 2
        rp = (np.tan(ti - tt) / np.tan(ti + tt)) ** 2
    r0 = ((n1 - n2) / (n1 + n2)) ** 2
    return np.where(small, r0, rs), np.where(small, r0, rp)


def schlick(cos_i, f0):
    """Schlick's approximation F0 + (1 − F0)(1 − cos θ)⁵ (Schlick 1994, "An inexpensive BRDF model
    for physically-based rendering", Computer Graphics Forum 13(3), eq. 24, number from memory)."""
    m = 1.0 - np.clip(cos_i, 0.0, 1.0)
    return f0 + (1.0 - f0) * m ** 5


# ------------------------------------------------------------------------------- statistics

def assert_within(got, expected, se, sigmas, extra=0.0, what=""):
    """Every |got − expected| < sigmas · se + extra, with the worst offender in the message; and
    the same for the sum over all values, whose standard error is sqrt(Σ se²) (independent
    pixels), so that a small error shared by every pixel is caught too."""
    got, expected, se = np.broadcast_arrays(np.asarray(got, float), np.asarray(expected, float),
                                            np.asarray(se, float))
    extra = np.broadcast_to(np.asarray(extra, float), got.shape)
    excess = np.abs(got - expected) - (sigmas * se + extra)
    if np.any(excess > 0):
        i = np.unravel_index(np.argmax(excess), got.shape)
        raise AssertionError(
            f"{what}: {np.count_nonzero(excess > 0)} of {got.size} values outside {sigmas} sigma; "
            f"worst at {i}: got {got[i]:.6g}, expected {expected[i]:.6g}, se {se[i]:.3g}, "
            f"extra {extra[i]:.3g}")
    total, total_se = np.sum(got - expected), math.sqrt(np.sum(se * se))
    if abs(total) > sigmas * total_se + np.sum(extra):
        raise AssertionError(f"{what}: the sum of the differences, {total:.6g}, is outside {sigmas} "
                             f"sigma ({total_se:.3g}) plus {np.sum(extra):.3g}")
