"""Colour science for checking dnmr's palette, written from the published standards (independent of dnmr).

- sRGB to linear RGB and linear RGB to CIE XYZ (D65): IEC 61966-2-1:1999 (sRGB), from memory.
- CIE XYZ to CIELAB (L*, a*, b*) with the D65 white point: CIE 15:2004 (Colorimetry), from memory.
- Colour-vision deficiency: the severity-1.0 (dichromat) matrices of Machado, Oliveira & Fernandes,
  "A physiologically-based model for simulation of color vision deficiency", IEEE TVCG 15, 1291 (2009),
  applied to linear RGB; values from memory (each row sums to 1, so white and greys stay unchanged).
"""
from __future__ import annotations

import numpy as np

SRGB_TO_XYZ = np.array([[0.4124, 0.3576, 0.1805],
                        [0.2126, 0.7152, 0.0722],
                        [0.0193, 0.1192, 0.9505]])
D65_WHITE = np.array([0.95047, 1.0, 1.08883])

MACHADO_2009 = {
    "protanopia": np.array([[0.152286, 1.052583, -0.204868],
                            [0.114503, 0.786281, 0.099216],
                            [-0.003882, -0.048116, 1.051998]]),
    "deuteranopia": np.array([[0.367322, 0.860646, -0.227968],
                              [0.280085, 0.672501, 0.047413],
                              [-0.011820, 0.042940, 0.968881]]),
    "tritanopia": np.array([[1.255528, -0.076749, -0.178779],
                            [-0.078411, 0.930809, 0.147602],
                            [0.004733, 0.691367, 0.303900]]),
}


def hex_to_rgb(colour: str) -> np.ndarray:
    """'#rrggbb' to sRGB in 0..1."""
    return np.array([int(colour[i:i + 2], 16) for i in (1, 3, 5)]) / 255.0


def linear_rgb(rgb: np.ndarray) -> np.ndarray:
    """Undo the sRGB transfer curve (IEC 61966-2-1)."""
    rgb = np.asarray(rgb, dtype=float)
    return np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)


def lab_from_linear(linear: np.ndarray) -> np.ndarray:
    """CIELAB (D65) of linear sRGB (CIE 15:2004)."""
    xyz = SRGB_TO_XYZ @ np.clip(linear, 0.0, 1.0) / D65_WHITE
    eps, kappa = 216 / 24389, 24389 / 27
    f = np.where(xyz > eps, np.cbrt(xyz), (kappa * xyz + 16) / 116)
    return np.array([116 * f[1] - 16, 500 * (f[0] - f[1]), 200 * (f[1] - f[2])])


def lab(colour: str, deficiency: str | None = None) -> np.ndarray:
    """CIELAB of a hex colour as seen normally or with a dichromacy (Machado 2009)."""
    linear = linear_rgb(hex_to_rgb(colour))
    if deficiency is not None:
        linear = MACHADO_2009[deficiency] @ linear
    return lab_from_linear(linear)


def lightness(colour: str) -> float:
    """CIE L* (0 black to 100 white): what a grey-scale print keeps of a colour."""
    return float(lab(colour)[0])


def colour_difference(first: str, second: str, deficiency: str | None = None) -> float:
    """CIE 1976 colour difference (Delta E*ab) of two hex colours, normally or with a dichromacy."""
    return float(np.linalg.norm(lab(first, deficiency) - lab(second, deficiency)))
