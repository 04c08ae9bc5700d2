"""What a ray sees where it hits: the surface's normals, UVs and tangent frame, and the material
resolved there (textures looked up and multiplied into the row's factors).

Both functions write into scratch arrays the caller allocated once per thread:

* `surf: (SURF_SIZE,) float64`, columns SF_*: the geometric normal (world, unit, outward for
  closed shapes: the triangle's winding, or the side of its vertex normals when it has them), the
  shading normal (interpolated vertex normal, else the geometric one), uv0, uv1, the tangent
  (world, unit) with its handedness, and the mesh's attribute bits;
* `rm: (MATERIAL_SIZE,) float64`, the resolved material row (material_table.py layout).

Normal maps follow the glTF 2.0 specification (section 3.9.3): the texel's rgb maps to
(2 c - 1) · (scale, scale, 1) in the tangent frame (T, B = w (N × T), N), T made orthogonal
to N first (Gram-Schmidt).

Shadow-terminator offset: a ray leaving a smooth-shaded low-poly surface starts from the point
of the curved surface that the vertex normals describe, not from the flat triangle: each
corner's tangent plane lifts the hit point, and the lifted points are blended with the
barycentrics (Hanika, "Hacking the Shadow Terminator", Ray Tracing Gems II, ch. 4, 2021). Only
lifts outward are kept, so a point never sinks below the flat triangle.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from .borrowing import borrowing
from .material_table import (
    M_ALPHA, M_ALPHA_CUTOFF, M_ALPHA_MODE, M_CLEARCOAT, M_CLEARCOAT_ROUGHNESS, M_COLOR, M_EMISSION, M_METALLIC,
    M_ROUGHNESS, M_SPECULAR, M_SPECULAR_COLOR, M_TEX_BASE, M_TEX_CLEARCOAT, M_TEX_CLEARCOAT_ROUGHNESS, M_TEX_EMISSIVE,
    M_TEX_METALLIC_ROUGHNESS, M_TEX_NORMAL, M_TEX_SPECULAR, M_TEX_SPECULAR_COLOR, M_TEX_TRANSMISSION,
    M_TRANSMISSION, M_TYPE, MATERIAL_SIZE, PBR,
)
from .mesh_table import ATTR_NORMAL, ATTR_TANGENT, ATTR_UV0, ATTR_UV1
from .scene_data import ALPHA_BLEND, ALPHA_MASK, ALPHA_OPAQUE
from .scene import KIND_SPHERE, normal_to_world, point_to_world, ray_to_object, tri_corners, vector_to_world
from .textures import TR_SCALE, TR_TEXCOORD, tex_lookup

SF_NG = 0  # geometric normal, 3 columns
SF_NS = 3  # shading normal, 3 columns
SF_UV0 = 6
SF_UV1 = 8
SF_TAN = 10  # tangent xyz and handedness w, 4 columns
SF_ATTR = 14  # ATTR_* bits of the mesh (0 for spheres)
SURF_SIZE = 16

__all__ = ["SURF_SIZE", "MATERIAL_SIZE", "hit_material", "hit_surface", "resolve_material", "apply_normal_map",
           "lifted_origin", "emission_at", "normals_hug_face"]


@njit(cache=True, inline="always")
def hit_material(S, inst, k):
    """Material row of the hit: the instance's own, else the triangle's."""
    m = S.inst_mat[inst]
    if m >= 0 or S.inst_kind[inst] == KIND_SPHERE:
        return max(m, 0)
    return S.tri_mat[k]


@borrowing()
def hit_surface(S, inst, k, u, v, px, py, pz, time_u, surf):
    """Fill `surf` for the hit (instance inst, triangle k, barycentrics u, v) at world point p."""
    motion = S.inst_motion[inst]
    moving = S.inst_moving[inst]
    if S.inst_kind[inst] == KIND_SPHERE:
        c = S.inst_sphere[inst]
        lox, loy, loz, _, _, _ = ray_to_object(motion, moving, time_u, px, py, pz, 0.0, 0.0, 1.0)
        nx, ny, nz = normal_to_world(motion, moving, time_u, lox - c[0], loy - c[1], loz - c[2])
        surf[SF_NG], surf[SF_NG + 1], surf[SF_NG + 2] = nx, ny, nz
        surf[SF_NS], surf[SF_NS + 1], surf[SF_NS + 2] = nx, ny, nz
        surf[SF_ATTR] = 0.0
        return
    ax, ay, az, bx, by, bz, cx, cy, cz = tri_corners(S, S.inst_mesh[inst], k, time_u)
    e1x = bx - ax
    e1y = by - ay
    e1z = bz - az
    e2x = cx - ax
    e2y = cy - ay
    e2z = cz - az
    gx, gy, gz = normal_to_world(motion, moving, time_u, e1y * e2z - e1z * e2y, e1z * e2x - e1x * e2z,
                                 e1x * e2y - e1y * e2x)
    attr = S.mesh_attr[S.inst_mesh[inst]]
    surf[SF_ATTR] = attr
    for j in range(SF_UV0, SF_TAN + 4):
        surf[j] = 0.0
    w0 = 1.0 - u - v
    nx, ny, nz = gx, gy, gz
    if attr & ATTR_NORMAL or attr & (ATTR_UV0 | ATTR_UV1) or attr & ATTR_TANGENT:
        a = S.tri_vtx[k, 0]
        b = S.tri_vtx[k, 1]
        c = S.tri_vtx[k, 2]
        if attr & ATTR_NORMAL:
            na = S.vtx_n[a]
            nb = S.vtx_n[b]
            nc = S.vtx_n[c]
            sx = w0 * na[0] + u * nb[0] + v * nc[0]
            sy = w0 * na[1] + u * nb[1] + v * nc[1]
            sz = w0 * na[2] + u * nb[2] + v * nc[2]
            if sx * sx + sy * sy + sz * sz > 1e-20:
                nx, ny, nz = normal_to_world(motion, moving, time_u, sx, sy, sz)
                # the geometric normal takes the side the vertex normals give (winding errors
                # in a file must not turn a surface inside out)
                if gx * nx + gy * ny + gz * nz < 0.0:
                    gx, gy, gz = -gx, -gy, -gz
        if attr & (ATTR_UV0 | ATTR_UV1):
            ua = S.vtx_uv[a]
            ub = S.vtx_uv[b]
            uc = S.vtx_uv[c]
            for j in range(4):
                surf[SF_UV0 + j] = w0 * ua[j] + u * ub[j] + v * uc[j]
        if attr & ATTR_TANGENT:
            ta = S.vtx_t[a]
            tb = S.vtx_t[b]
            tc = S.vtx_t[c]
            tx, ty, tz = vector_to_world(motion, moving, time_u, w0 * ta[0] + u * tb[0] + v * tc[0],
                                         w0 * ta[1] + u * tb[1] + v * tc[1], w0 * ta[2] + u * tb[2] + v * tc[2])
            tn = math.sqrt(tx * tx + ty * ty + tz * tz)
            if tn > 0.0:
                tx, ty, tz = tx / tn, ty / tn, tz / tn
            surf[SF_TAN], surf[SF_TAN + 1], surf[SF_TAN + 2] = tx, ty, tz
            # the bitangent w (N × T) flips under a mirroring placement (negative scale product)
            m0 = motion[0]
            mirror = m0[7] * m0[8] * m0[9] < 0.0
            surf[SF_TAN + 3] = -1.0 if (ta[3] < 0.0) != mirror else 1.0
    surf[SF_NG], surf[SF_NG + 1], surf[SF_NG + 2] = gx, gy, gz
    surf[SF_NS], surf[SF_NS + 1], surf[SF_NS + 2] = nx, ny, nz


@njit(cache=True, inline="always")
def _texture(S, ref, surf):
    """(r, g, b, a) of texture reference `ref` at the hit's UV set for it."""
    col = SF_UV1 if S.texrefs[ref, TR_TEXCOORD] >= 1.0 else SF_UV0
    return tex_lookup(S.tex_pixels, S.tex_info, S.texrefs, S.srgb_lut, ref, surf[col], surf[col + 1])


@njit(cache=True, inline="always")
def _tint(S, row, tex_col, rm, col, surf):
    """rm[col:col + 3] *= the rgb of the texture row[tex_col] names, if it names one."""
    ref = int(row[tex_col])
    if ref >= 0:
        r, g, b, _ = _texture(S, ref, surf)
        rm[col] *= r
        rm[col + 1] *= g
        rm[col + 2] *= b


@njit(cache=True, inline="always")
def _scale(S, row, tex_col, channel, rm, col, surf):
    """rm[col] *= one channel of the texture row[tex_col] names, if it names one."""
    ref = int(row[tex_col])
    if ref >= 0:
        rm[col] *= _texture(S, ref, surf)[channel]


@borrowing()
def resolve_material(S, mid, surf, rm):
    """Copy material row `mid` into `rm` with its textures applied; returns the coverage alpha
    (base colour alpha × factor; 1 for the legacy types)."""
    row = S.mats[mid]
    for j in range(MATERIAL_SIZE):
        rm[j] = row[j]
    if row[M_TYPE] != PBR:
        return 1.0
    alpha = row[M_ALPHA]
    if not int(surf[SF_ATTR]) & (ATTR_UV0 | ATTR_UV1):
        return alpha  # no UVs: factors only
    ref = int(row[M_TEX_BASE])
    if ref >= 0:
        r, g, b, a = _texture(S, ref, surf)
        rm[M_COLOR] *= r
        rm[M_COLOR + 1] *= g
        rm[M_COLOR + 2] *= b
        alpha *= a
    ref = int(row[M_TEX_METALLIC_ROUGHNESS])
    if ref >= 0:
        r, g, b, a = _texture(S, ref, surf)
        rm[M_ROUGHNESS] *= g  # glTF: roughness in G, metalness in B
        rm[M_METALLIC] *= b
    _tint(S, row, M_TEX_EMISSIVE, rm, M_EMISSION, surf)
    _tint(S, row, M_TEX_SPECULAR_COLOR, rm, M_SPECULAR_COLOR, surf)
    _scale(S, row, M_TEX_TRANSMISSION, 0, rm, M_TRANSMISSION, surf)  # glTF: R
    _scale(S, row, M_TEX_CLEARCOAT, 0, rm, M_CLEARCOAT, surf)  # R
    _scale(S, row, M_TEX_CLEARCOAT_ROUGHNESS, 1, rm, M_CLEARCOAT_ROUGHNESS, surf)  # G
    _scale(S, row, M_TEX_SPECULAR, 3, rm, M_SPECULAR, surf)  # A
    return alpha


@borrowing()
def apply_normal_map(S, row, surf):
    """Bend the shading normal in `surf` by the material's normal map, if it has one and the
    mesh has UVs and tangents (glTF 2.0 section 3.9.3)."""
    ref = int(row[M_TEX_NORMAL])
    attr = int(surf[SF_ATTR])
    if ref < 0 or not attr & ATTR_TANGENT or not attr & (ATTR_UV0 | ATTR_UV1):
        return
    r, g, b, a = _texture(S, ref, surf)
    scale = S.texrefs[ref, TR_SCALE]
    mx = (2.0 * r - 1.0) * scale
    my = (2.0 * g - 1.0) * scale
    mz = 2.0 * b - 1.0
    nx, ny, nz = surf[SF_NS], surf[SF_NS + 1], surf[SF_NS + 2]
    tx, ty, tz = surf[SF_TAN], surf[SF_TAN + 1], surf[SF_TAN + 2]
    d = tx * nx + ty * ny + tz * nz
    tx, ty, tz = tx - d * nx, ty - d * ny, tz - d * nz
    tn = math.sqrt(tx * tx + ty * ty + tz * tz)
    if tn <= 1e-12:
        return
    tx, ty, tz = tx / tn, ty / tn, tz / tn
    w = surf[SF_TAN + 3]
    bx = w * (ny * tz - nz * ty)
    by = w * (nz * tx - nx * tz)
    bz = w * (nx * ty - ny * tx)
    ox = mx * tx + my * bx + mz * nx
    oy = mx * ty + my * by + mz * ny
    oz = mx * tz + my * bz + mz * nz
    on = math.sqrt(ox * ox + oy * oy + oz * oz)
    if on > 1e-12:
        surf[SF_NS], surf[SF_NS + 1], surf[SF_NS + 2] = ox / on, oy / on, oz / on


@borrowing()
def lifted_origin(S, inst, k, u, v, px, py, pz, time_u):
    """The world point on the smooth surface the vertex normals describe, above the flat hit p
    (Hanika 2021; see the module docstring). p itself for spheres and meshes without normals."""
    if S.inst_kind[inst] == KIND_SPHERE or not S.mesh_attr[S.inst_mesh[inst]] & ATTR_NORMAL:
        return px, py, pz
    ax, ay, az, bx, by, bz, cx, cy, cz = tri_corners(S, S.inst_mesh[inst], k, time_u)
    w0 = 1.0 - u - v
    # the hit in object space, from the barycentrics (exact, unlike moving p back)
    qx = w0 * ax + u * bx + v * cx
    qy = w0 * ay + u * by + v * cy
    qz = w0 * az + u * bz + v * cz
    ox = qx
    oy = qy
    oz = qz
    for j in range(3):
        bw = w0 if j == 0 else (u if j == 1 else v)
        vx = ax if j == 0 else (bx if j == 1 else cx)
        vy = ay if j == 0 else (by if j == 1 else cy)
        vz = az if j == 0 else (bz if j == 1 else cz)
        n = S.vtx_n[S.tri_vtx[k, j]]
        # the corner's tangent plane through it: lift q onto the plane when q lies below it
        d = (qx - vx) * n[0] + (qy - vy) * n[1] + (qz - vz) * n[2]
        if d < 0.0:
            ox -= bw * d * n[0]
            oy -= bw * d * n[1]
            oz -= bw * d * n[2]
    return point_to_world(S.inst_motion[inst], S.inst_moving[inst], time_u, ox, oy, oz)


@borrowing()
def emission_at(S, mid, inst, k, u, v):
    """Emitted radiance (r, g, b) of material row `mid` at barycentrics (u, v) of triangle k of
    instance inst (k < 0: a sphere): the factor, times the emissive texture where there is one."""
    row = S.mats[mid]
    er, eg, eb = row[M_EMISSION], row[M_EMISSION + 1], row[M_EMISSION + 2]
    if k < 0 or row[M_TYPE] != PBR:
        return er, eg, eb
    has_uv = S.mesh_attr[S.inst_mesh[inst]] & (ATTR_UV0 | ATTR_UV1)
    # the emission a ray sees there: textured, and as covered as the surface is (a cut-out
    # emits nothing, partial coverage emits its share), so light samples and rays agree
    cover = row[M_ALPHA]
    ref = int(row[M_TEX_BASE])
    if row[M_ALPHA_MODE] != ALPHA_OPAQUE and ref >= 0 and has_uv:
        tu, tv = _uv_at(S, ref, k, u, v)
        cover *= tex_lookup(S.tex_pixels, S.tex_info, S.texrefs, S.srgb_lut, ref, tu, tv)[3]
    if row[M_ALPHA_MODE] == ALPHA_MASK:
        cover = 1.0 if cover >= row[M_ALPHA_CUTOFF] else 0.0
    elif row[M_ALPHA_MODE] == ALPHA_BLEND:
        cover = min(1.0, max(0.0, cover))
    else:
        cover = 1.0
    ref = int(row[M_TEX_EMISSIVE])
    if ref >= 0 and has_uv:
        tu, tv = _uv_at(S, ref, k, u, v)
        r, g, b, _ = tex_lookup(S.tex_pixels, S.tex_info, S.texrefs, S.srgb_lut, ref, tu, tv)
        er, eg, eb = er * r, eg * g, eb * b
    return er * cover, eg * cover, eb * cover


@njit(cache=True, inline="always")
def _uv_at(S, ref, k, u, v):
    """The UV set texture reference `ref` reads, at barycentrics (u, v) of triangle k."""
    col = 2 if S.texrefs[ref, TR_TEXCOORD] >= 1.0 else 0
    w0 = 1.0 - u - v
    a = S.vtx_uv[S.tri_vtx[k, 0]]
    b = S.vtx_uv[S.tri_vtx[k, 1]]
    c = S.vtx_uv[S.tri_vtx[k, 2]]
    return w0 * a[col] + u * b[col] + v * c[col], w0 * a[col + 1] + u * b[col + 1] + v * c[col + 1]


@borrowing()
def normals_hug_face(S, inst, k, time_u, min_cos):
    """True when every vertex normal of triangle k lies within acos(min_cos) of the triangle's
    own normal: a mesh that approximates a smooth surface, whose shading may be trusted where it
    disagrees with the flat face near the shadow terminator. False for spheres and meshes
    without normals."""
    if S.inst_kind[inst] == KIND_SPHERE or not S.mesh_attr[S.inst_mesh[inst]] & ATTR_NORMAL:
        return False
    ax, ay, az, bx, by, bz, cx, cy, cz = tri_corners(S, S.inst_mesh[inst], k, time_u)
    e1x, e1y, e1z = bx - ax, by - ay, bz - az
    e2x, e2y, e2z = cx - ax, cy - ay, cz - az
    gx = e1y * e2z - e1z * e2y
    gy = e1z * e2x - e1x * e2z
    gz = e1x * e2y - e1y * e2x
    gn = math.sqrt(gx * gx + gy * gy + gz * gz)
    if gn <= 0.0:
        return False
    for j in range(3):
        n = S.vtx_n[S.tri_vtx[k, j]]
        nn = math.sqrt(n[0] * n[0] + n[1] * n[1] + n[2] * n[2])
        if nn <= 0.0 or abs(gx * n[0] + gy * n[1] + gz * n[2]) < min_cos * gn * nn:
            return False
    return True
