"""glTF 2.0 animation: channel sampling, node transforms at a time, and matrix decomposition.

Works on the plain data of `scene_data.py` with numpy only (it runs once per frame per node, on
the Python side). Morph targets and skins are in `skinning.py`.

Sampling follows the glTF 2.0 specification (Khronos, 2021), section 3.11 "Animations" and
Appendix C "Interpolation":

* LINEAR: v = (1 - u) v_k + u v_{k+1} with u = (t - t_k) / (t_{k+1} - t_k); rotations by
  spherical linear interpolation along the shorter arc (Shoemake 1985, "Animating rotation with
  quaternion curves"), which is the spec's C.2 formula with s = sign(v_k · v_{k+1}).
* STEP: v = v_k for t_k <= t < t_{k+1}.
* CUBICSPLINE: the cubic Hermite spline of C.3, with t_d = t_{k+1} - t_k, p0 = v_k,
  m0 = t_d b_k (out-tangent of key k), p1 = v_{k+1}, m1 = t_d a_{k+1} (in-tangent of key k+1):
  v = (2u³ - 3u² + 1) p0 + (u³ - 2u² + u) m0 + (-2u³ + 3u²) p1 + (u³ - u²) m1.
* Rotation results are normalised (C.3 asks it of splines; it does no harm to the others).
* Before the first key and after the last a channel holds that key's value (section 3.11:
  "clamped"). A single key is a constant.

A node's local matrix is T · R · S (section 3.5.3); a node given by `matrix` is not animated
(section 3.5.3 forbids animating it), so channels aimed at such a node are ignored. Every
animation plays at once from time 0 (SceneData's contract); when two channels target the same
node and path (possible only across animations), the later one in `scene.channels` wins.
"""

from __future__ import annotations

import math
import weakref

import numpy as np

from lampyr.errors import AssetError
from .animation import quat_slerp, quat_to_matrix
from .scene_data import Channel, SceneData

SHEAR_TOLERANCE = 1e-5  # see decompose_trs

# per-scene lookups (a SceneData is frozen, so they never go stale); freed with the scene
_TARGETS: weakref.WeakKeyDictionary = weakref.WeakKeyDictionary()
_ORDERS: weakref.WeakKeyDictionary = weakref.WeakKeyDictionary()


# ---------------------------------------------------------------------------------------------
# sampling


def _key_interval(times: np.ndarray, t: float) -> tuple[int, float]:
    """(k, u): the key k with times[k] <= t < times[k+1] and the fraction u in [0, 1); t inside."""
    k = int(np.searchsorted(times, t, side="right")) - 1
    td = float(times[k + 1] - times[k])
    u = (t - float(times[k])) / td if td > 0.0 else 0.0
    return k, min(max(u, 0.0), 1.0)


def _hermite(p0, m0, p1, m1, u: float) -> np.ndarray:
    """Cubic Hermite basis of glTF 2.0 Appendix C.3 (tangents already scaled by t_d)."""
    u2 = u * u
    u3 = u2 * u
    return (
        (2.0 * u3 - 3.0 * u2 + 1.0) * p0
        + (u3 - 2.0 * u2 + u) * m0
        + (-2.0 * u3 + 3.0 * u2) * p1
        + (u3 - u2) * m1
    )


def sample_channel(channel: Channel, t: float) -> np.ndarray:
    """The value of `channel` at time `t` seconds: (n,) float64 (n = 3, 4 w-x-y-z, or K weights).

    LINEAR, STEP and CUBICSPLINE as glTF 2.0 Appendix C defines them; clamped to the first and
    last keys' values outside the keyed range; rotations come back unit length.
    """
    times = np.asarray(channel.times, np.float64)
    values = np.asarray(channel.values, np.float64)
    cubic = channel.interpolation == "CUBICSPLINE"
    points = values[:, 1, :] if cubic else values  # (K, n) the key values themselves
    t = float(t)
    if t <= times[0]:
        out = points[0].copy()
    elif t >= times[-1]:
        out = points[-1].copy()
    else:
        k, u = _key_interval(times, t)
        if channel.interpolation == "STEP":
            out = points[k].copy()
        elif cubic:
            td = float(times[k + 1] - times[k])
            out = _hermite(points[k], td * values[k, 2], points[k + 1], td * values[k + 1, 0], u)
        elif channel.path == "rotation":
            out = quat_slerp(points[k], points[k + 1], u)
        else:
            out = (1.0 - u) * points[k] + u * points[k + 1]
    if channel.path == "rotation":
        norm = float(np.linalg.norm(out))
        out = out / norm if norm > 0.0 else np.array([1.0, 0.0, 0.0, 0.0])
    return out


def animation_length(scene: SceneData) -> float:
    """Seconds from time 0 to the last key of any channel (0.0 for a scene without animation)."""
    return max((float(np.max(c.times)) for c in scene.channels if len(c.times)), default=0.0)


def channels_by_target(scene: SceneData) -> dict[tuple[int, str], Channel]:
    """{(node, path): channel}, the later channel winning when two aim at the same target.

    Built once per scene and kept while the scene lives; treat it as read-only."""
    found = _TARGETS.get(scene)
    if found is None:
        found = {(c.node, c.path): c for c in scene.channels}
        _TARGETS[scene] = found
    return found


# ---------------------------------------------------------------------------------------------
# node transforms


def compose_trs(translation, rotation, scale) -> np.ndarray:
    """(4, 4) float64 T · R · S from translation (3,), unit quaternion (4,) w-x-y-z, scale (3,)."""
    m = np.eye(4)
    m[:3, :3] = quat_to_matrix(rotation) * np.asarray(scale, np.float64)[None, :]
    m[:3, 3] = translation
    return m


def node_trs(scene: SceneData, node: int, t: float, targets=None):
    """(translation (3,), rotation (4,) w-x-y-z, scale (3,)) of a TRS node at time t seconds."""
    targets = channels_by_target(scene) if targets is None else targets
    spec = scene.nodes[node]
    trs = []
    for path, rest in (("translation", spec.translation), ("rotation", spec.rotation), ("scale", spec.scale)):
        channel = targets.get((node, path))
        trs.append(sample_channel(channel, t) if channel is not None else np.array(rest, np.float64))
    return tuple(trs)


def node_locals(scene: SceneData, t: float) -> np.ndarray:
    """(N, 4, 4) float64: every node's parent-from-node matrix at time t seconds.

    A TRS node's rest translation, rotation and scale are replaced by its animated channels;
    a node given by `matrix` keeps its matrix.
    """
    targets = channels_by_target(scene)
    out = np.empty((len(scene.nodes), 4, 4))
    for i, spec in enumerate(scene.nodes):
        if spec.matrix is not None:
            out[i] = spec.matrix
        else:
            out[i] = compose_trs(*node_trs(scene, i, t, targets))
    return out


def node_order(scene: SceneData) -> list[int]:
    """Node indices with every parent before its children, whatever order the file used.

    Raises AssetError when the parent links form a cycle or name a missing node.
    """
    found = _ORDERS.get(scene)
    if found is None:
        found = _ORDERS[scene] = _node_order(scene)
    return list(found)


def _node_order(scene: SceneData) -> tuple:
    n = len(scene.nodes)
    state = [0] * n  # 0 unvisited, 1 on the current chain, 2 placed
    order: list[int] = []
    for start in range(n):
        chain = []
        i = start
        while i != -1 and state[i] == 0:
            state[i] = 1
            chain.append(i)
            parent = scene.nodes[i].parent
            if parent != -1 and not 0 <= parent < n:
                raise AssetError(f"nodes[{i}]", f"parent {parent} is not a node (0..{n - 1})", scene.path)
            i = parent
        if i != -1 and state[i] == 1:
            raise AssetError(f"nodes[{i}]", "is its own ancestor; node parents must form a tree", scene.path)
        for j in reversed(chain):
            state[j] = 2
            order.append(j)
    return tuple(order)


def world_matrices(scene: SceneData, t: float, locals_=None) -> np.ndarray:
    """(N, 4, 4) float64 world-from-node matrices at time t: parent world · local, root first.

    `locals_` (N, 4, 4) may be passed when already computed by `node_locals(scene, t)`.
    """
    local = node_locals(scene, t) if locals_ is None else locals_
    world = np.empty_like(local)
    for i in node_order(scene):
        parent = scene.nodes[i].parent
        world[i] = local[i] if parent == -1 else world[parent] @ local[i]
    return world


def morph_weights(scene: SceneData, node: int, t: float) -> np.ndarray:
    """(K,) float64 morph weights of `node`'s mesh at time t seconds.

    The node's "weights" channel if it has one, else the node's `weights`, else the mesh's
    default weights (glTF 2.0 section 3.7.2.2 and 3.11); an empty array for a node without any.
    """
    channel = channels_by_target(scene).get((node, "weights"))
    if channel is not None:
        return sample_channel(channel, t)
    spec = scene.nodes[node]
    if spec.weights is not None:
        return np.array(spec.weights, np.float64)
    if spec.mesh >= 0:
        return np.array(scene.meshes[spec.mesh].morph_weights, np.float64)
    return np.zeros(0)


# ---------------------------------------------------------------------------------------------
# decomposition for the compiler's (translation, quaternion, per-axis scale) instances


def quat_from_matrix(rot: np.ndarray) -> np.ndarray:
    """(4,) unit quaternion w-x-y-z, w >= 0, of a (3, 3) proper rotation matrix.

    Shepperd's method (S. W. Shepperd 1978, "Quaternion from rotation matrix", Journal of
    Guidance and Control 1(3)): take the square root of the largest of 1 + trace, 1 + 2 R_ii - trace
    to stay away from cancellation.
    """
    r = np.asarray(rot, np.float64)
    tr = r[0, 0] + r[1, 1] + r[2, 2]
    cands = (tr, r[0, 0], r[1, 1], r[2, 2])
    k = int(np.argmax(cands))
    if k == 0:
        s = 2.0 * math.sqrt(max(1.0 + tr, 0.0))
        q = np.array([0.25 * s, (r[2, 1] - r[1, 2]) / s, (r[0, 2] - r[2, 0]) / s, (r[1, 0] - r[0, 1]) / s])
    else:
        i = k - 1
        j, l = (i + 1) % 3, (i + 2) % 3
        s = 2.0 * math.sqrt(max(1.0 + r[i, i] - r[j, j] - r[l, l], 0.0))
        q = np.empty(4)
        q[0] = (r[l, j] - r[j, l]) / s
        q[1 + i] = 0.25 * s
        q[1 + j] = (r[j, i] + r[i, j]) / s
        q[1 + l] = (r[l, i] + r[i, l]) / s
    q /= np.linalg.norm(q)
    return -q if q[0] < 0.0 else q


def _nearest_rotation(b: np.ndarray) -> np.ndarray:
    """The proper rotation closest to (3, 3) b in the Frobenius norm (polar factor through the
    SVD, determinant forced to +1): b itself when b is already a rotation; for a rank-deficient b
    (a zero scale) a rotation that agrees with b's non-zero columns."""
    u, _, vt = np.linalg.svd(b)
    d = np.ones(3)
    d[2] = np.sign(np.linalg.det(u @ vt)) or 1.0
    return (u * d[None, :]) @ vt


def decompose_trs(matrix, tol: float = SHEAR_TOLERANCE, mirror_axis: int = 0):
    """Split a (4, 4) affine matrix into (translation (3,), quaternion (4,) w-x-y-z, scale (3,), exact).

    scale is the length of each column of the 3x3 part; the rotation is the nearest proper
    rotation to the columns divided by their scales. A matrix with a negative determinant (a
    mirror) gets a negative scale on `mirror_axis` (x by default; always the same axis, so an
    animated mirrored node does not flip its quaternion between frames). A zero scale on an axis
    is kept (a node scaled to nothing), the rotation then built from the other columns.

    exact is True when compose_trs(t, q, s) reproduces `matrix`: the bottom row is (0, 0, 0, 1)
    and every pair of non-zero columns is orthogonal, |cos| <= tol. The default 1e-5: matrices
    from files are float32 (relative rounding 2^-24 ≈ 6e-8), so an unsheared matrix's column
    cosines are of order 1e-7; a shear of 1e-5 moves a point 10 m from the pivot by 0.1 mm,
    below what a frame shows. When exact is False (shear or projection) the result is the nearest
    rotation with the column lengths as scales, an approximation the caller may refuse.
    """
    m = np.asarray(matrix, np.float64)
    a = m[:3, :3]
    t = m[:3, 3].copy()
    s = np.linalg.norm(a, axis=0)
    scale_ref = max(float(s.max()), 1e-300)
    live = s > 1e-12 * scale_ref
    if np.linalg.det(a) < 0.0:
        s[mirror_axis] = -s[mirror_axis]
    b = np.zeros((3, 3))
    b[:, live] = a[:, live] / s[live][None, :]
    q = quat_from_matrix(_nearest_rotation(b))
    exact = bool(np.allclose(m[3], (0.0, 0.0, 0.0, 1.0), rtol=0.0, atol=tol))
    cols = np.flatnonzero(live)
    for ii in range(len(cols)):
        for jj in range(ii + 1, len(cols)):
            i, j = cols[ii], cols[jj]
            if abs(float(a[:, i] @ a[:, j])) > tol * abs(s[i] * s[j]):
                exact = False
    return t, q, s, exact
