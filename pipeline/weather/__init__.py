"""Physically based scene conditions in numpy/OpenCV only, one module per job.

``colour``
    sRGB and linear light, luminance, HSV scaling, compositing.
``distance``
    The per-pixel distance map of a photo without a depth sensor, and where it guesses.
``contact``
    Where upright scenery meets the ground, per column (for ``distance``).
``sky``
    Where the sky is, from colour, smoothness and position.
``fog``
    Koschmieder's law, the meteorological optical range, the airlight, object contrast.
``rain``, ``snow``, ``night``
    Falling particles and wet roads; snow cover; the low-light curve, sensor noise, lamps, the night sky.

Every function is pure: arrays and keyword options in, arrays out, randomness through one ``rng``. Images
are (H, W, 3) uint8 sRGB; light is mixed in linear sRGB (IEC 61966-2-1) because Koschmieder's law and the
Weber contrast are about radiance, not about gamma-encoded pixel values.
"""
