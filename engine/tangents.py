"""Vertex tangents for a normal-mapped mesh whose file gives none.

The glTF 2.0 specification (section 3.7.2.1) asks for MikkTSpace (Mikkelsen, "Simulation of
wrinkled surfaces revisited", 2008) when TANGENT is missing. This module follows the classic
per-triangle construction (Lengyel, "Computing tangent space basis vectors for an arbitrary
mesh", 2001): each triangle's tangent T = dP/du and bitangent dP/dv come from its edges and UV
differences,

    e1 = du1 T + dv1 B,  e2 = du2 T + dv2 B  =>  T = (dv2 e1 - dv1 e2) / d,  B = (du1 e2 - du2 e1) / d,
    d = du1 dv2 - du2 dv1,

and borrows three of MikkTSpace's choices: at each corner the triangle's vectors are projected
into the vertex normal's plane, normalised and weighted by the corner's angle before they are
summed; and triangles of opposite UV orientation (sign of d) are summed apart, as MikkTSpace keeps
them in separate groups. MikkTSpace then gives such a vertex two tangent frames; one row per vertex
cannot, so the group of larger total corner angle wins (a mirrored UV seam on shared vertices is
right on one side only; an exporter splits those vertices). The sum is Gram-Schmidt
orthogonalised against the normal. The measured difference to MikkTSpace is in bench/textures.py
and tests/engine/test_tangents.py.

Handedness, glTF 2.0 section 3.7.2.1: bitangent = cross(normal, tangent.xyz) · w. The normal
texture's +Y is "up" in the image (section 3.9.3), which in glTF UVs (v grows downwards) is
-dP/dv; so w = +1 where cross(N, T) points along -dP/dv. (This is what MikkTSpace gives when fed
(u, 1 - v), the usual v-up convention.)
"""

from __future__ import annotations

import numpy as np


def _unit(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(rows of `a` scaled to unit length where nonzero, their lengths)."""
    n = np.linalg.norm(a, axis=-1)
    safe = np.where(n > 0.0, n, 1.0)
    return a / safe[..., None], n


def _any_perpendicular(n: np.ndarray) -> np.ndarray:
    """(k, 3) unit vectors perpendicular to unit rows n (Duff et al., "Building an orthonormal
    basis, revisited", JCGT 2017, listing 3)."""
    sign = np.where(n[:, 2] >= 0.0, 1.0, -1.0)
    a = -1.0 / (sign + n[:, 2])
    b = n[:, 0] * n[:, 1] * a
    return np.stack([1.0 + sign * n[:, 0] * n[:, 0] * a, sign * b, -sign * n[:, 0]], axis=1)


def _face_frames(positions, uvs, faces):
    """Per triangle (T = dP/du, U = -dP/dv, ok, d): the UV derivatives (F, 3), which are usable,
    and the UV determinant d (its sign is the triangle's orientation in UV space)."""
    p = positions[faces]
    t = uvs[faces]
    e1, e2 = p[:, 1] - p[:, 0], p[:, 2] - p[:, 0]
    du1, dv1 = t[:, 1, 0] - t[:, 0, 0], t[:, 1, 1] - t[:, 0, 1]
    du2, dv2 = t[:, 2, 0] - t[:, 0, 0], t[:, 2, 1] - t[:, 0, 1]
    d = du1 * dv2 - du2 * dv1
    uv_area = np.maximum(np.abs(du1 * dv2), np.abs(du2 * dv1))
    ok = np.isfinite(d) & (np.abs(d) > 1e-12 * np.maximum(uv_area, 1e-300)) & (d != 0.0)
    inv = np.where(ok, 1.0 / np.where(ok, d, 1.0), 0.0)
    T = (dv2[:, None] * e1 - dv1[:, None] * e2) * inv[:, None]
    B = (du1[:, None] * e2 - du2[:, None] * e1) * inv[:, None]
    return T, -B, ok, d


def _corner_angles(positions, faces) -> np.ndarray:
    """(F, 3) interior angle of each triangle corner, radians."""
    p = positions[faces]
    out = np.zeros(faces.shape, np.float64)
    for k in range(3):
        a = p[:, (k + 1) % 3] - p[:, k]
        b = p[:, (k + 2) % 3] - p[:, k]
        out[:, k] = np.arctan2(np.linalg.norm(np.cross(a, b), axis=1), np.sum(a * b, axis=1))
        out[np.all(a == 0.0, axis=1) | np.all(b == 0.0, axis=1), k] = 0.0  # a collapsed corner weighs nothing
    return out


def vertex_tangents(positions, normals, uvs, faces) -> np.ndarray:
    """(V, 4) float64 tangents: xyz unit and perpendicular to the vertex normal, w = ±1.

    positions (V, 3), normals (V, 3) (normalised here), uvs (V, 2) in glTF's convention (v down),
    faces (F, 3) int. A vertex that no triangle with usable UVs touches gets some unit vector
    perpendicular to its normal and w = +1.
    """
    positions = np.asarray(positions, np.float64)
    normals, nlen = _unit(np.asarray(normals, np.float64))
    uvs = np.asarray(uvs, np.float64)
    faces = np.asarray(faces, np.int64).reshape(-1, 3)
    nv = len(positions)
    T, U, ok, d = _face_frames(positions, uvs, faces)
    angles = np.where(ok[:, None], _corner_angles(positions, faces), 0.0)
    group = np.where(d < 0.0, 1, 0)  # UV orientation: 0 counter-clockwise, 1 clockwise
    acc_t = np.zeros((2, nv, 3))
    acc_u = np.zeros((2, nv, 3))
    weight = np.zeros((2, nv))
    for k in range(3):
        idx = faces[:, k]
        n = normals[idx]
        tk, _ = _unit(T - n * np.sum(n * T, axis=1, keepdims=True))
        uk, _ = _unit(U - n * np.sum(n * U, axis=1, keepdims=True))
        np.add.at(acc_t, (group, idx), tk * angles[:, k:k + 1])
        np.add.at(acc_u, (group, idx), uk * angles[:, k:k + 1])
        np.add.at(weight, (group, idx), angles[:, k])
    pick = np.where(weight[1] > weight[0], 1, 0)  # the orientation with the larger total angle
    acc_t = acc_t[pick, np.arange(nv)]
    acc_u = acc_u[pick, np.arange(nv)]
    tangent, tlen = _unit(acc_t - normals * np.sum(normals * acc_t, axis=1, keepdims=True))
    missing = (tlen <= 1e-12 * np.maximum(np.linalg.norm(acc_t, axis=1), 1e-300)) | (tlen == 0.0)
    good_n = nlen > 0.0
    fallback = missing & good_n
    if np.any(fallback):
        tangent[fallback] = _any_perpendicular(normals[fallback])
    no_normal = missing & ~good_n
    tangent[no_normal] = (1.0, 0.0, 0.0)
    w = np.where(np.sum(np.cross(normals, tangent) * acc_u, axis=1) < 0.0, -1.0, 1.0)
    return np.concatenate([tangent, w[:, None]], axis=1)


def vertex_tangents_reference(positions, normals, uvs, faces) -> np.ndarray:
    """Slow readable `vertex_tangents`, one triangle corner at a time (for the tests)."""
    positions = np.asarray(positions, np.float64)
    uvs = np.asarray(uvs, np.float64)
    nrm = []
    for n in np.asarray(normals, np.float64):
        length = float(np.linalg.norm(n))
        nrm.append(n / length if length > 0 else n)
    # per vertex and UV orientation (0: d > 0 or d = 0, 1: d < 0): summed tangent, up vector, angle
    acc_t = [[np.zeros(3), np.zeros(3)] for _ in positions]
    acc_u = [[np.zeros(3), np.zeros(3)] for _ in positions]
    weight = [[0.0, 0.0] for _ in positions]
    for tri in np.asarray(faces, np.int64).reshape(-1, 3):
        p0, p1, p2 = positions[tri]
        (u0, v0), (u1, v1), (u2, v2) = uvs[tri]
        e1, e2 = p1 - p0, p2 - p0
        du1, dv1, du2, dv2 = u1 - u0, v1 - v0, u2 - u0, v2 - v0
        d = du1 * dv2 - du2 * dv1
        if not np.isfinite(d) or d == 0.0 or abs(d) <= 1e-12 * max(abs(du1 * dv2), abs(du2 * dv1)):
            continue
        t = (dv2 * e1 - dv1 * e2) / d  # dP/du
        up = -(du1 * e2 - du2 * e1) / d  # -dP/dv: up in the image
        g = 1 if d < 0 else 0
        corners = (p0, p1, p2)
        for k, i in enumerate(tri):
            a = corners[(k + 1) % 3] - corners[k]
            b = corners[(k + 2) % 3] - corners[k]
            degenerate = not np.any(a) or not np.any(b)
            angle = 0.0 if degenerate else float(np.arctan2(np.linalg.norm(np.cross(a, b)), a @ b))
            n = nrm[i]
            weight[i][g] += angle
            for vec, acc in ((t, acc_t), (up, acc_u)):
                proj = vec - n * (n @ vec)
                length = np.linalg.norm(proj)
                if length > 0:
                    acc[i][g] += angle * proj / length
    out = np.zeros((len(positions), 4))
    for i, n in enumerate(nrm):
        g = 1 if weight[i][1] > weight[i][0] else 0
        summed_t, summed_u = acc_t[i][g], acc_u[i][g]
        t = summed_t - n * (n @ summed_t)
        length = np.linalg.norm(t)
        if length > 1e-12 * max(np.linalg.norm(summed_t), 1e-300) and length > 0:
            t = t / length
        elif np.linalg.norm(n) > 0:
            t = _any_perpendicular(n[None, :])[0]
        else:
            t = np.array([1.0, 0.0, 0.0])
        out[i, :3] = t
        out[i, 3] = -1.0 if np.cross(n, t) @ summed_u < 0.0 else 1.0
    return out
