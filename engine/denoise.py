"""The denoised layer: a frame's mean radiance through Open Image Denoise (the `pyoidn` package).

Arrays in, arrays out; the only module that calls pyoidn. The filter is OIDN's "RT" filter on its
CPU device, in HDR mode (the mean is scene-linear radiance, not clipped to [0, 1]), guided by the
frame's albedo and normal layers.

Guides. The albedo and normal layers are means over the pixel's samples, so they are noisy where
the first hit varies inside a pixel over time or the lens (motion blur, depth of field) and behind
glass (the first hit is the glass). Two modes:

  GUIDES_AS_IS      (the default) the guides go in as they are, `cleanAux` unset: the filter
                    then assumes they may be noisy and relies on them less.
  GUIDES_PREFILTER  each guide is first denoised on its own by an RT filter given
                    only that guide, and the beauty is then denoised with `cleanAux` set; this is
                    the prefiltering the Open Image Denoise documentation (section "RT filter",
                    Intel, from memory) gives for the highest quality with noisy auxiliary images.

bench/denoise.py measures both. On this 2-core machine prefiltering lowered the error against a
1024-spp render by about 10 % (relative RMSE 0.093 against 0.102 on the noisy test shot) but made
one 1920 x 1080 frame cost 7-10.5 s instead of 1.4 s, because each guide's filter costs more than
the beauty's; the head denoises on its own loop, so the default is GUIDES_AS_IS.

OIDN's output is not an unbiased estimate: the layer is for looking and delivering, never for
merging or refining (the frame's RGBA stays the unbiased mean, see exr.py).
"""

from __future__ import annotations

import threading

import numpy as np

GUIDES_PREFILTER = "prefilter"
GUIDES_AS_IS = "as-is"
GUIDE_MODES = (GUIDES_PREFILTER, GUIDES_AS_IS)
QUALITIES = ("high", "balanced", "fast")

_lock = threading.Lock()  # one shared CPU device; OIDN filters are not re-entrant
_device = None


def _rgb(a, what: str) -> np.ndarray:
    a = np.ascontiguousarray(a, dtype=np.float32)
    if a.ndim != 3 or a.shape[2] != 3 or a.shape[0] == 0 or a.shape[1] == 0:
        raise ValueError(f"{what}: expected an (h, w, 3) image, got shape {a.shape}")
    return a


def _cpu_device():
    global _device
    if _device is None:
        import pyoidn

        dev = pyoidn.Device(pyoidn.OIDN_DEVICE_TYPE_CPU)
        dev.commit()
        _device = dev
    return _device


def _filter_guide(name: str, image: np.ndarray, quality: str) -> np.ndarray:
    """One guide (albedo or normal) denoised on its own by an RT filter (prefiltering)."""
    import pyoidn

    out = np.empty_like(image)
    with pyoidn.Filter(_cpu_device(), "RT") as f:
        f.set_image(name, image, pyoidn.OIDN_FORMAT_FLOAT3)
        f.set_image("output", out, pyoidn.OIDN_FORMAT_FLOAT3)
        f.set_quality(_quality_constants()[quality])
        f.commit()
        f.execute()
    return out


def _quality_constants() -> dict:
    import pyoidn

    return {"high": pyoidn.OIDN_QUALITY_HIGH, "balanced": pyoidn.OIDN_QUALITY_BALANCED,
            "fast": pyoidn.OIDN_QUALITY_FAST}


def denoise_frame(color, albedo, normal, *, guides: str = GUIDES_AS_IS,
                  quality: str = "high", guide_quality: str = "fast") -> np.ndarray:
    """The denoised picture of a frame.

    color:  (h, w, 3) mean radiance, scene-linear (any float dtype; negative values are clipped
            to 0, as the HDR filter takes nonnegative colours).
    albedo: (h, w, 3) mean first-hit albedo in [0, 1] (0 where nothing was hit).
    normal: (h, w, 3) mean first-hit normal, components in [-1, 1], not renormalised (0 where
            nothing was hit).
    guides: GUIDES_PREFILTER or GUIDES_AS_IS (see the module docstring).
    quality: 'high', 'balanced' or 'fast' (OIDN's quality levels) of the beauty's filter;
    guide_quality: the same for the guides' prefilters (GUIDES_PREFILTER only).
    Returns (h, w, 3) float32, C-contiguous.
    """
    import pyoidn

    if guides not in GUIDE_MODES:
        raise ValueError(f"guides: expected one of {', '.join(GUIDE_MODES)}, got {guides!r}")
    for what, q in (("quality", quality), ("guide_quality", guide_quality)):
        if q not in QUALITIES:
            raise ValueError(f"{what}: expected one of {', '.join(QUALITIES)}, got {q!r}")
    c = _rgb(np.maximum(np.nan_to_num(np.asarray(color, dtype=np.float32)), 0.0), "color")
    a = _rgb(np.clip(albedo, 0.0, 1.0), "albedo")
    n = _rgb(np.clip(normal, -1.0, 1.0), "normal")
    if a.shape != c.shape or n.shape != c.shape:
        raise ValueError(f"color, albedo and normal differ in shape: {c.shape}, {a.shape}, "
                         f"{n.shape}")
    with _lock:
        if guides == GUIDES_PREFILTER:
            a = _filter_guide("albedo", a, guide_quality)
            n = _filter_guide("normal", n, guide_quality)
    # pyoidn.denoise serialises its own calls
    out = pyoidn.denoise(c, a, n, hdr=True, clean_aux=guides == GUIDES_PREFILTER, quality=quality)
    return np.ascontiguousarray(out, dtype=np.float32)


def denoise_film(film, *, guides: str = GUIDES_AS_IS, quality: str = "high",
                 guide_quality: str = "fast") -> np.ndarray:
    """`denoise_frame` of a Film's mean, guided by its albedo and normal means.

    Returns (h, w, 3) float32."""
    return denoise_frame(film.mean(), film.albedo(), film.normal_mean(), guides=guides,
                         quality=quality, guide_quality=guide_quality)
