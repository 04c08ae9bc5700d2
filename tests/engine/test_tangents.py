"""Vertex tangents: the glTF handedness convention and analytic tangent fields.

Sources: the glTF 2.0 specification, sections 3.7.2.1 (bitangent = cross(normal, tangent.xyz) · w)
and 3.9.3 (normal texture: +X right, +Y up in the image); analytic derivatives of a sphere and a
height field with a skewed (sheared, anisotropic) UV layout; the MikkTSpace reference
implementation is compared in bench/textures.py where `pymikktspace` is installed (it is not a project
dependency: its sdist needs Cython < 3 to build on Python 3.11).
"""

from __future__ import annotations

import numpy as np
import pytest

from lampyr.engine.tangents import vertex_tangents, vertex_tangents_reference


def angle_deg(a, b):
    a = a / np.linalg.norm(a, axis=1, keepdims=True)
    b = b / np.linalg.norm(b, axis=1, keepdims=True)
    return np.degrees(np.arctan2(np.linalg.norm(np.cross(a, b), axis=1), np.sum(a * b, axis=1)))


def gram_schmidt(t, n):
    t = t - n * np.sum(n * t, axis=1, keepdims=True)
    return t / np.linalg.norm(t, axis=1, keepdims=True)


def skewed_sphere(n_theta=32, n_phi=64, shear=0.3):
    """A unit UV sphere, outward normals, UVs (u0, v0 + shear · u0) with u0 = phi / 2pi and v0 =
    theta / pi (glTF v down: the north pole is the image's top row), and the analytic dP/du, dP/dv
    of that layout: with u0 = u, v0 = v - shear · u, dP/du = 2pi P_phi - shear pi P_theta and
    dP/dv = pi P_theta. `inner` marks vertices off the two rings at the poles."""
    th = np.linspace(0, np.pi, n_theta + 1)
    ph = np.linspace(0, 2 * np.pi, n_phi + 1)
    t, p = (a.reshape(-1) for a in np.meshgrid(th, ph, indexing="ij"))
    pos = np.stack([np.sin(t) * np.sin(p), np.cos(t), np.sin(t) * np.cos(p)], 1)
    u0, v0 = p / (2 * np.pi), t / np.pi
    uv = np.stack([u0, v0 + shear * u0], 1)
    w = n_phi + 1
    faces = []
    for i in range(n_theta):
        for j in range(n_phi):
            a, b, c, d = i * w + j, i * w + j + 1, (i + 1) * w + j, (i + 1) * w + j + 1
            faces += [(a, c, b), (b, c, d)]  # counter-clockwise seen from outside
    p_phi = np.stack([np.sin(t) * np.cos(p), 0 * t, -np.sin(t) * np.sin(p)], 1)
    p_theta = np.stack([np.cos(t) * np.sin(p), -np.sin(t), np.cos(t) * np.cos(p)], 1)
    dpdu = 2 * np.pi * p_phi - shear * np.pi * p_theta
    dpdv = np.pi * p_theta
    inner = (t > th[1] + 1e-9) & (t < th[-2] - 1e-9)
    return pos, pos.copy(), uv, np.array(faces), dpdu, dpdv, inner


def bumpy_sheet(n=24, seed=0):
    """A height field z = 0.2 sin(3x) cos(2y) over jittered (irregular) grid points, its analytic
    normals, UVs an affine skew of (x, y) (uv = A (x, y)), and the analytic dP/du, dP/dv:
    (x, y) = A^-1 uv, so dP/du = P_x A^-1[0, 0] + P_y A^-1[1, 0], likewise for v."""
    rng = np.random.default_rng(seed)
    g = np.linspace(-1, 1, n + 1)
    x, y = (a.reshape(-1) for a in np.meshgrid(g, g, indexing="ij"))
    step = g[1] - g[0]
    edge = (np.abs(x) == 1) | (np.abs(y) == 1)
    x = x + np.where(edge, 0, rng.uniform(-0.3, 0.3, x.shape) * step)
    y = y + np.where(edge, 0, rng.uniform(-0.3, 0.3, y.shape) * step)
    z = 0.2 * np.sin(3 * x) * np.cos(2 * y)
    zx, zy = 0.6 * np.cos(3 * x) * np.cos(2 * y), -0.4 * np.sin(3 * x) * np.sin(2 * y)
    pos = np.stack([x, y, z], 1)
    px = np.stack([np.ones_like(x), 0 * x, zx], 1)
    py = np.stack([0 * x, np.ones_like(x), zy], 1)
    nrm = np.cross(px, py)
    nrm /= np.linalg.norm(nrm, axis=1, keepdims=True)
    a = np.array([[0.7, 0.4], [-0.2, 1.3]])
    uv = np.stack([x, y], 1) @ a.T
    ainv = np.linalg.inv(a)
    dpdu = px * ainv[0, 0] + py * ainv[1, 0]
    dpdv = px * ainv[0, 1] + py * ainv[1, 1]
    w = n + 1
    faces = []
    for i in range(n):
        for j in range(n):
            a_, b, c, d = i * w + j, (i + 1) * w + j, i * w + j + 1, (i + 1) * w + j + 1
            faces += [(a_, b, c), (c, b, d)]  # counter-clockwise seen from +z
    return pos, nrm, uv, np.array(faces), dpdu, dpdv, np.ones(len(pos), bool)


def quad(u_right=True):
    """The unit square in z = 0 facing +z; glTF UVs with v = 0 on the top edge (y = 1)."""
    pos = np.array([[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0]], np.float64)
    u = pos[:, 0] if u_right else 1 - pos[:, 0]
    uv = np.stack([u, 1 - pos[:, 1]], 1)
    return pos, np.tile([0.0, 0.0, 1.0], (4, 1)), uv, np.array([[0, 1, 2], [0, 2, 3]])


@pytest.mark.parametrize("u_right, tangent, w", [(True, [1, 0, 0], 1.0), (False, [-1, 0, 0], -1.0)])
def test_flat_quad_follows_the_gltf_handedness(u_right, tangent, w):
    # glTF 2.0 3.9.3: the normal texture's +Y is up in the image (here +y); 3.7.2.1: bitangent =
    # cross(N, T) · w. u to the right: T = +x, cross(+z, +x) = +y, so w = +1; mirrored u: w = -1
    got = vertex_tangents(*quad(u_right))
    np.testing.assert_allclose(got[:, :3], np.tile(tangent, (4, 1)), atol=1e-15)
    assert np.all(got[:, 3] == w)


@pytest.mark.parametrize("mesh", [skewed_sphere, bumpy_sheet])
def test_tangents_are_unit_perpendicular_and_signed(mesh):
    pos, nrm, uv, faces, *_ = mesh()
    t = vertex_tangents(pos, nrm, uv, faces)
    assert t.shape == (len(pos), 4) and t.dtype == np.float64
    np.testing.assert_allclose(np.linalg.norm(t[:, :3], axis=1), 1.0, atol=1e-12)
    np.testing.assert_allclose(np.sum(t[:, :3] * nrm, axis=1), 0.0, atol=1e-12)
    assert set(np.unique(t[:, 3])) <= {-1.0, 1.0}


# measured (bench/textures.py): sphere 32 x 64 max 3.6°, mean 0.09° (MikkTSpace gives the same);
# sheet max 0.51°, mean 0.07°. The bounds leave room for the discretisation, not for a wrong
# formula (a wrong sign or a swapped u / v gives tens of degrees). The 64² sheet has one folded
# sliver triangle (UV orientation reversed), which summed with its neighbours tilted a tangent by 11°
@pytest.mark.parametrize("mesh, max_deg, mean_deg", [(skewed_sphere, 5.0, 0.2), (bumpy_sheet, 1.0, 0.15),
                                                     (lambda: bumpy_sheet(64), 1.0, 0.1)])
def test_tangents_follow_the_analytic_field(mesh, max_deg, mean_deg):
    pos, nrm, uv, faces, dpdu, dpdv, inner = mesh()
    t = vertex_tangents(pos, nrm, uv, faces)
    err = angle_deg(t[:, :3], gram_schmidt(dpdu, nrm))[inner]
    assert err.max() < max_deg and err.mean() < mean_deg


@pytest.mark.parametrize("mesh", [skewed_sphere, bumpy_sheet])
def test_handedness_follows_the_analytic_field(mesh):
    # w = +1 where cross(N, T) points up the image, along -dP/dv (glTF v grows downwards)
    pos, nrm, uv, faces, dpdu, dpdv, inner = mesh()
    t = vertex_tangents(pos, nrm, uv, faces)
    expected = np.where(np.sum(np.cross(nrm, gram_schmidt(dpdu, nrm)) * -dpdv, axis=1) < 0, -1.0, 1.0)
    np.testing.assert_array_equal(t[inner, 3], expected[inner])


def test_error_shrinks_with_refinement():
    # a consistent estimate of dP/du: the sphere's worst angle falls as the mesh gets finer
    errs = []
    for n in (8, 16, 32):
        pos, nrm, uv, faces, dpdu, _, inner = skewed_sphere(n, 2 * n)
        t = vertex_tangents(pos, nrm, uv, faces)
        errs.append(angle_deg(t[:, :3], gram_schmidt(dpdu, nrm))[inner].mean())
    assert errs[0] > errs[1] > errs[2]


def test_vertex_without_usable_uvs_gets_a_perpendicular_unit():
    pos, nrm, _, faces = quad()
    t = vertex_tangents(pos, nrm, np.zeros((4, 2)), faces)  # all UVs equal: no derivative
    np.testing.assert_allclose(np.linalg.norm(t[:, :3], axis=1), 1.0, atol=1e-12)
    np.testing.assert_allclose(t[:, :3] @ [0, 0, 1], 0.0, atol=1e-12)
    assert np.all(t[:, 3] == 1.0)


def mirrored_patch():
    """A small sheet whose UVs are mirrored (u -> -u) on some vertices: both UV orientations meet."""
    pos, nrm, uv, faces, *_ = bumpy_sheet(6, 3)
    uv = uv.copy()
    uv[::5, 0] *= -1.0
    return pos, nrm, uv, faces


@pytest.mark.parametrize("mesh", [lambda: skewed_sphere(7, 9), lambda: bumpy_sheet(6, 3), mirrored_patch])
def test_vectorised_matches_the_reference(mesh):
    pos, nrm, uv, faces, *_ = mesh()
    np.testing.assert_allclose(vertex_tangents(pos, nrm, uv, faces),
                               vertex_tangents_reference(pos, nrm, uv, faces), rtol=0, atol=1e-12)
