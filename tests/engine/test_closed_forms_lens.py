"""Depth of field: the blur disc of an out-of-focus bright ball against thin-lens geometry.

The camera looks along −z from the origin with a lens of radius A (`aperture`) focused on the
plane at distance f (`focus`). A ray of the thin-lens model leaves a point a of the lens disc
for the point the pinhole ray of film coordinate s (tangent units: s = (sx, sy), the ray w + sx r +
sy v) reaches on the focus plane, s·f; at depth z it is at lateral offset a (1 − z/f) + s z (similar
triangles). A small emitting ball of radius r at depth z on the axis is therefore seen from the
lens points within ρ = r f / (z − f) of c(s) = s z f / (z − f), and a pixel shows

    L(s) = Le · area(lens disc ∩ disc(c(s), ρ)) / (π A²),

a disc of blur of radius A (1/f − 1/z) in tangent units (plus the ball's own size r/z): the circle
of confusion of thin-lens geometry (e.g. Potmesil & Chakravarty 1981, "A lens and aperture camera
model for synthetic image generation", SIGGRAPH; the form here is derived above from similar
triangles). The ball's outline is taken as a disc of radius r in its own depth plane: the cone of
rays tangent to it differs by (r/z)²/2 ≈ 1e-4 of r, far below the noise.

Each sample's value is Le or 0 (the ray hits the ball or not), so the variance of a pixel mean is
Le² q (1 − q) / n with q = L/Le, exactly; rings of pixels are compared within 4 standard errors.
"""

from __future__ import annotations

import math

import numpy as np

from .closed_forms import render
from .scenes import load, shot_text

LE, A, F, Z, R = 25.0, 0.2, 2.0, 6.0, 0.08
SIZE, TAN_HALF = 32, 0.1


def _lens_overlap(d, rho, a):
    """Area of the intersection of a disc of radius a at the origin with a disc of radius rho whose
    centre is at distance d (the circle–circle lens area, elementary geometry)."""
    d = np.asarray(d, float)
    out = np.zeros_like(d)
    inside = d <= abs(a - rho)
    out[inside] = math.pi * min(a, rho) ** 2
    part = (~inside) & (d < a + rho)
    dd = d[part]
    c1 = np.clip((dd * dd + a * a - rho * rho) / (2 * dd * a), -1, 1)
    c2 = np.clip((dd * dd + rho * rho - a * a) / (2 * dd * rho), -1, 1)
    out[part] = (a * a * np.arccos(c1) + rho * rho * np.arccos(c2)
                 - 0.5 * np.sqrt(np.maximum(0.0, (-dd + a + rho) * (dd + a - rho) * (dd - a + rho) * (dd + a + rho))))
    return out


def _expected(sub=16):
    """Per pixel (SIZE, SIZE) the expected radiance, averaged over a sub × sub grid in the pixel."""
    off = (np.arange(sub) + 0.5) / sub
    f = (np.arange(SIZE)[:, None] + off[None, :]).ravel()
    sx = (2 * f / SIZE - 1) * TAN_HALF
    sy = (1 - 2 * f / SIZE) * TAN_HALF
    s = np.hypot(sx[None, :], sy[:, None])
    rho = R * F / (Z - F)
    q = _lens_overlap(s * Z * F / (Z - F), rho, A) / (math.pi * A * A)
    return LE * q.reshape(SIZE, sub, SIZE, sub).mean(axis=(1, 3))


def test_blur_disc_of_an_out_of_focus_ball_follows_thin_lens_geometry(tmp_path):
    fov = math.degrees(2 * math.atan(TAN_HALF))
    shot = load(tmp_path, shot_text(f"""
[[material]]
name = "lamp"
type = "diffuse"
color = [0, 0, 0]
emission = [{LE}, {LE}, {LE}]
[[object]]
name = "lamp"
material = "lamp"
sphere = {{ center = [0, 0, {-Z}], radius = {R} }}
""", width=SIZE, height=SIZE, samples=1024, bounces=1,
        camera=f"position = [0, 0, 0]\ntarget = [0, 0, -1]\nfov = {fov}\naperture = {A}\nfocus = {F}"))
    mean, _, film = render(shot)
    g = mean[..., 1]
    expected = _expected()

    # the disc's radius in pixels: A (1/f − 1/z) over the pixel's size in tangent units
    radius_px = A * (1 / F - 1 / Z) / (2 * TAN_HALF / SIZE)
    assert 10 < radius_px < 11

    # outside the blur disc (and the ball's own blur of r/z) nothing at all
    zero = expected == 0.0
    assert zero.sum() > 300
    assert np.all(g[zero] == 0.0)

    # rings one pixel wide about the image centre: mean radiance against the expected one
    yy, xx = np.mgrid[0:SIZE, 0:SIZE] + 0.5
    ring = np.floor(np.hypot(xx - SIZE / 2, yy - SIZE / 2)).astype(int)
    n = film.n
    q = expected / LE
    for k in range(int(radius_px) + 3):
        m = (ring == k) & ~zero
        if not m.any():
            continue
        se = LE * math.sqrt(np.sum(q[m] * (1 - q[m]) / n[m])) / m.sum()
        assert abs(g[m].mean() - expected[m].mean()) < 4 * se, (k, g[m].mean(), expected[m].mean(), se)

    # power: inside, a pixel sees the ball from (ρ/A)² of the lens; a lens of twice the radius
    # (a diameter taken for a radius) would give a quarter of it over a disc twice as wide
    # (pixels wholly within (A − ρ)(1/f − 1/z), 8.5 pixels, where the ball's lens disc lies
    # inside the lens)
    inner = ring < radius_px - 4
    full = LE * (R * F / (Z - F) / A) ** 2
    assert np.allclose(expected[inner], full, rtol=1e-12)
    se_inner = LE * math.sqrt(np.sum(q[inner] * (1 - q[inner]) / n[inner])) / inner.sum()
    assert abs(g[inner].mean() - full) < 4 * se_inner
    assert abs(g[inner].mean() - full / 4) > 20 * se_inner
