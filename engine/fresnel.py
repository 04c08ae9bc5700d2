"""Fresnel reflectance of smooth interfaces, and refraction by Snell's law.

Conventions: `cos_i` is the cosine between the incident direction and the normal on the
incident side (its sign is ignored); `eta = n_t / n_i`, the index on the far side of the
interface over the index on the side the light comes from. All functions are scalar
@njit(cache=True) kernels; nothing allocates.

Sources: the Fresnel equations in cosine form (e.g. Hecht, *Optics*, §4.6), Schlick's
approximation for conductors (Schlick 1994, "An inexpensive BRDF model for physically-based
rendering", Computer Graphics Forum 13(3)), and the closed form of the hemispherical
(cosine-weighted) Fresnel reflectance given by Stern (1964, Applied Optics 3(1), "Transmission
of isotropic radiation across an interface between two dielectrics"; formula from memory,
checked against numerical quadrature in tests/engine/test_fresnel.py).
"""

from __future__ import annotations

import math

from numba import njit

# below this |eta - 1| an interface is treated as index-matched (no reflection at all)
INDEX_MATCHED = 1e-4


@njit(cache=True)
def fresnel_dielectric_sp(cos_i, n1, n2):
    """(Rs, Rp): reflectance for light polarised perpendicular (s) and parallel (p) to the plane
    of incidence, going from index n1 into index n2 at incidence cosine cos_i.

    Total internal reflection (n1 > n2 past the critical angle) gives (1.0, 1.0).
    """
    c = min(abs(cos_i), 1.0)
    # Snell: n1 sin θi = n2 sin θt
    sin2_t = (n1 / n2) * (n1 / n2) * (1.0 - c * c)
    if sin2_t >= 1.0:
        return 1.0, 1.0
    cos_t = math.sqrt(1.0 - sin2_t)
    rs = (n1 * c - n2 * cos_t) / (n1 * c + n2 * cos_t)
    rp = (n2 * c - n1 * cos_t) / (n2 * c + n1 * cos_t)
    return rs * rs, rp * rp


@njit(cache=True)
def fresnel_dielectric(cos_i, eta):
    """Unpolarised reflectance R = (Rs + Rp) / 2 of a dielectric interface, eta = n_t / n_i.

    1.0 under total internal reflection.
    """
    rs, rp = fresnel_dielectric_sp(cos_i, 1.0, eta)
    return 0.5 * (rs + rp)


@njit(cache=True)
def fresnel_schlick(cos_i, f0):
    """Schlick's approximation F0 + (1 - F0)(1 - cos)^5, for one colour channel of a conductor
    whose normal-incidence reflectance is f0."""
    m = 1.0 - min(abs(cos_i), 1.0)
    m2 = m * m
    return f0 + (1.0 - f0) * m2 * m2 * m


@njit(cache=True)
def refract_cos(cos_i, eta):
    """|cos θt| of the refracted ray for incidence cosine cos_i and eta = n_t / n_i, or -1.0 under
    total internal reflection."""
    c = min(abs(cos_i), 1.0)
    sin2_t = (1.0 - c * c) / (eta * eta)
    if sin2_t >= 1.0:
        return -1.0
    return math.sqrt(1.0 - sin2_t)


@njit(cache=True)
def _diffuse_fresnel_external(n):
    """Stern's closed form of 2∫ R(cos) cos dcos over [0, 1] for light arriving from index 1 onto
    index n > 1 (the unpolarised reflectance averaged over a cosine-weighted hemisphere)."""
    n2 = n * n
    n4 = n2 * n2
    return (0.5
            + (n - 1.0) * (3.0 * n + 1.0) / (6.0 * (n + 1.0) ** 2)
            + n2 * (n2 - 1.0) ** 2 / (n2 + 1.0) ** 3 * math.log((n - 1.0) / (n + 1.0))
            - 2.0 * n2 * n * (n2 + 2.0 * n - 1.0) / ((n2 + 1.0) * (n4 - 1.0))
            + 8.0 * n4 * (n4 + 1.0) / ((n2 + 1.0) * (n4 - 1.0) ** 2) * math.log(n))


@njit(cache=True)
def diffuse_fresnel(eta):
    """Hemispherical (cosine-weighted) unpolarised reflectance of an interface, eta = n_t / n_i.

    For eta < 1 (light inside the denser medium) the identity 1 - F_int = (1 - F_ext) / n²
    (the n² law of radiance across the interface) gives the internal value from the external.
    """
    if abs(eta - 1.0) < INDEX_MATCHED:
        return 0.0
    if eta > 1.0:
        # the closed form cancels near n = 1, but keeps ~1e-6 relative accuracy (measured
        # against quadrature) down to n = 1 + 2 * INDEX_MATCHED
        return _diffuse_fresnel_external(eta)
    n = 1.0 / eta
    return 1.0 - (1.0 - _diffuse_fresnel_external(n)) / (n * n)


@njit(cache=True)
def schlick_weight(c):
    """(1 - |c|)^5, Schlick's (1994) interpolation weight between F0 and F90."""
    x = 1.0 - min(abs(c), 1.0)
    x2 = x * x
    return x2 * x2 * x


@njit(cache=True)
def ior_f0(ior):
    """Reflectance at normal incidence of an interface air | ior: ((ior - 1) / (ior + 1))²
    (Fresnel equations at normal incidence; KHR_materials_ior). ior = 0 gives 1."""
    r = (ior - 1.0) / (ior + 1.0)
    return r * r
