"""Our colour-blind-safe colour maps and class colours, with the colour science to check them."""

from __future__ import annotations

import numpy as np
from matplotlib.colors import LinearSegmentedColormap, ListedColormap, to_rgb

__all__ = [
    "OKABE_ITO",
    "CHANGE_CLASS_COLOURS",
    "REACH_CLASS_COLOURS",
    "CLASS_COLOURS",
    "NO_DATA_COLOUR",
    "suitability_cmap",
    "change_cmap",
    "agreement_colours",
    "year_cmap",
    "year_colours",
    "srgb_to_linear",
    "linear_to_srgb",
    "srgb_to_lab",
    "lab_to_srgb",
    "simulate_cvd",
    "delta_e",
    "CVD_MATRICES",
]

# The eight-colour qualitative set of Okabe & Ito (2008), chosen by its authors to stay
# distinct for protan, deutan and tritan viewers. Only the hex values are theirs; which
# class gets which colour is our choice.
OKABE_ITO = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky_blue": "#56B4E9",
    "bluish_green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish_purple": "#CC79A7",
}

#: Colour of cells without data (sea, masked) in maps: left transparent over a pale
#: background rather than painted, so the land outline carries the shape.
NO_DATA_COLOUR = "#FFFFFF"

# Assignment (ours): what stays is the calm blue, what is lost is the warm vermillion (the
# two most different hues for every viewer), gains are green, a gain into novel climate
# takes the purple so that it reads as "gain, but look again", and a stable cell in novel
# climate the pale sky blue of "stable, but look again"; absent is a pale grey that recedes
# behind the others.
CHANGE_CLASS_COLOURS = {
    "absent": "#DDDDDD",
    "lost": OKABE_ITO["vermillion"],
    "stable": OKABE_ITO["blue"],
    "gained": OKABE_ITO["bluish_green"],
    "gained_novel": OKABE_ITO["reddish_purple"],
    "stable_novel": OKABE_ITO["sky_blue"],
}

# Same blue/vermillion/green for the classes the two maps share; the two kinds of gain the
# species cannot use take orange (climate suitable, not reached in time) and sky blue
# (climate suitable, no habitat).
REACH_CLASS_COLOURS = {
    "stable": OKABE_ITO["blue"],
    "lost": OKABE_ITO["vermillion"],
    "gained_reached": OKABE_ITO["bluish_green"],
    "gained_unreached": OKABE_ITO["orange"],
    "gained_no_habitat": OKABE_ITO["sky_blue"],
}

#: Every class name we colour, for looking up a colour by name.
CLASS_COLOURS = {**CHANGE_CLASS_COLOURS, **REACH_CLASS_COLOURS}

# --------------------------------------------------------------------------------------
# Colour science: sRGB <-> CIE 1976 L*a*b* (D65) and colour-vision-deficiency simulation.
# --------------------------------------------------------------------------------------

# sRGB primaries to CIE XYZ, D65 white. Reference: IEC 61966-2-1:1999, section 5.2.
_RGB_TO_XYZ = np.array([[0.4124, 0.3576, 0.1805],
                        [0.2126, 0.7152, 0.0722],
                        [0.0193, 0.1192, 0.9505]])
_XYZ_TO_RGB = np.linalg.inv(_RGB_TO_XYZ)
# D65 reference white (Y = 1), CIE 15:2004 Table T.3.
_WHITE_D65 = np.array([0.95047, 1.0, 1.08883])
_DELTA = 6.0 / 29.0  # CIE 1976 L*a*b* break point of f(t)

# Machado, Oliveira & Fernandes (2009), severity 1.0; applied to linear sRGB.
CVD_MATRICES = {
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


def _as_rgb_array(colours) -> np.ndarray:
    """Colours (hex strings, names or RGB triples in 0-1) as an (n, 3) float array."""
    if isinstance(colours, str):
        colours = [colours]
    arr = np.asarray(colours, dtype=object)
    if arr.ndim == 2 and arr.shape[1] == 3 and not isinstance(arr[0, 0], str):
        return np.asarray(colours, dtype=float)
    return np.array([to_rgb(c) for c in colours], dtype=float)


def srgb_to_linear(rgb) -> np.ndarray:
    """Undo the sRGB transfer curve (0-1 in, 0-1 out).

    References
    ----------
    IEC 61966-2-1:1999, Multimedia systems and equipment - Colour measurement and
    management - Part 2-1: Default RGB colour space - sRGB, eq. (5).
    """
    c = np.asarray(rgb, dtype=float)
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


def linear_to_srgb(linear) -> np.ndarray:
    """Apply the sRGB transfer curve (inverse of :func:`srgb_to_linear`; IEC 61966-2-1 eq. 7)."""
    c = np.clip(np.asarray(linear, dtype=float), 0.0, 1.0)
    return np.where(c <= 0.0031308, 12.92 * c, 1.055 * c ** (1.0 / 2.4) - 0.055)


def _linear_to_lab(linear: np.ndarray) -> np.ndarray:
    xyz = linear @ _RGB_TO_XYZ.T
    t = xyz / _WHITE_D65
    # CIE 1976: cube root above the break, a straight line below it
    f = np.where(t > _DELTA ** 3, np.cbrt(t), t / (3 * _DELTA ** 2) + 4.0 / 29.0)
    lightness = 116.0 * f[..., 1] - 16.0
    a = 500.0 * (f[..., 0] - f[..., 1])
    b = 200.0 * (f[..., 1] - f[..., 2])
    return np.stack([lightness, a, b], axis=-1)


def srgb_to_lab(colours) -> np.ndarray:
    """CIE 1976 L*a*b* (D65) of sRGB colours.

    Parameters
    ----------
    colours : str or sequence of str or array-like of shape (n, 3)
        Hex strings / matplotlib colour names, or sRGB triples in 0-1.

    Returns
    -------
    ndarray of shape (n, 3)
        L* (0-100), a*, b*.

    References
    ----------
    IEC 61966-2-1:1999 (sRGB to XYZ); CIE 15:2004, Colorimetry, 3rd ed., section 8.2.1
    (CIE 1976 L*a*b*).
    """
    return _linear_to_lab(srgb_to_linear(_as_rgb_array(colours)))


def lab_to_srgb(lab) -> np.ndarray:
    """sRGB (0-1, clipped to the gamut) of CIE 1976 L*a*b* (D65) colours; inverse of :func:`srgb_to_lab`.

    References
    ----------
    CIE 15:2004, section 8.2.1 (inverse of f); IEC 61966-2-1:1999.
    """
    lab = np.atleast_2d(np.asarray(lab, dtype=float))
    fy = (lab[:, 0] + 16.0) / 116.0
    fx = fy + lab[:, 1] / 500.0
    fz = fy - lab[:, 2] / 200.0
    f = np.stack([fx, fy, fz], axis=-1)
    t = np.where(f > _DELTA, f ** 3, 3 * _DELTA ** 2 * (f - 4.0 / 29.0))
    linear = (t * _WHITE_D65) @ _XYZ_TO_RGB.T
    return linear_to_srgb(linear)


def simulate_cvd(colours, deficiency: str) -> np.ndarray:
    """How colours look to a dichromat: sRGB (0-1) after the Machado et al. (2009) model.

    Parameters
    ----------
    colours : str or sequence or array-like of shape (n, 3)
    deficiency : {"protanopia", "deuteranopia", "tritanopia"}

    References
    ----------
    Machado, G. M., Oliveira, M. M. & Fernandes, L. A. F. (2009). A physiologically-based
    model for simulation of color vision deficiency. IEEE Transactions on Visualization and
    Computer Graphics 15(6), 1291-1298. doi:10.1109/TVCG.2009.113 (severity 1.0 matrices).
    """
    if deficiency not in CVD_MATRICES:
        from envelope.errors import InputError
        raise InputError(f"deficiency {deficiency!r}: expected one of {sorted(CVD_MATRICES)}")
    linear = srgb_to_linear(_as_rgb_array(colours))
    return linear_to_srgb(np.clip(linear @ CVD_MATRICES[deficiency].T, 0.0, 1.0))


def delta_e(colour_a, colour_b) -> float:
    """CIE 1976 colour difference ΔE*ab between two sRGB colours (Euclidean distance in L*a*b*).

    References
    ----------
    CIE 15:2004, section 8.2.1 (eq. 8.4, ΔE*ab).
    """
    lab = srgb_to_lab([to_rgb(colour_a), to_rgb(colour_b)])
    return float(np.linalg.norm(lab[0] - lab[1]))


# --------------------------------------------------------------------------------------
# Continuous colour maps, built in CIELAB so that lightness rises evenly.
# --------------------------------------------------------------------------------------

def _lab_ramp(name: str, anchors: list[tuple[float, float, float]], n: int = 256) -> ListedColormap:
    """A colour map through CIELAB anchors, lightness and chroma linear between anchors.

    Interpolating in L*a*b* (rather than in sRGB) keeps equal steps in data near-equal
    steps in perceived colour (CIE 1976 L*a*b* is approximately perceptually uniform).
    """
    anchors = np.asarray(anchors, dtype=float)
    s = np.linspace(0.0, 1.0, n)
    pos = np.linspace(0.0, 1.0, len(anchors))
    lab = np.stack([np.interp(s, pos, anchors[:, k]) for k in range(3)], axis=-1)
    return ListedColormap(lab_to_srgb(lab), name=name)


# Suitability: dark blue-violet (L* 18) through teal and moss green to pale straw (L* 94).
# L* rises linearly end to end, so the map reads as a lightness ramp in greyscale and to
# every dichromat; the hue path (blue -> green -> yellow) is along the blue-yellow axis that
# protan and deutan viewers keep. Anchors are ours.
_SUITABILITY_ANCHORS = [
    (18.0, 18.0, -38.0),
    (37.0, -8.0, -24.0),
    (56.0, -30.0, 6.0),
    (75.0, -18.0, 42.0),
    (94.0, -4.0, 30.0),
]

# Change / MESS: negative (novel climate) warm brown-orange, zero a near-white neutral,
# positive blue; both arms fall symmetrically in lightness from the centre, so the sign
# reads as hue and the size as darkness. Blue against orange survives protan and deutan
# vision. Anchors are ours.
_CHANGE_ANCHORS = [
    (32.0, 28.0, 42.0),
    (64.0, 22.0, 48.0),
    (97.0, 0.0, 2.0),
    (64.0, -6.0, -32.0),
    (32.0, 8.0, -44.0),
]


def suitability_cmap(n: int = 256) -> ListedColormap:
    """Sequential map for suitability 0-1: lightness rises evenly from dark to pale.

    References
    ----------
    Crameri, F., Shephard, G. E. & Heron, P. J. (2020). The misuse of colour in science
    communication. Nature Communications 11, 5444. doi:10.1038/s41467-020-19160-7
    (why lightness must change monotonically and evenly).
    """
    return _lab_ramp("envelope_suitability", _SUITABILITY_ANCHORS, n).with_extremes(bad=(0, 0, 0, 0))


def change_cmap(n: int = 256) -> ListedColormap:
    """Diverging map for change and MESS: negative (novel) orange-brown, 0 neutral, positive blue."""
    return _lab_ramp("envelope_change", _CHANGE_ANCHORS, n).with_extremes(bad=(0, 0, 0, 0))


def agreement_colours(n_models: int) -> list[tuple[float, float, float]]:
    """``n_models + 1`` colours for "k of n models agree", k = 0..n, pale (none) to dark (all).

    Sampled from the suitability ramp run backwards, so more agreement is darker in any
    rendering (greyscale included).
    """
    if n_models < 1:
        from envelope.errors import InputError
        raise InputError(f"n_models: found {n_models}, expected at least 1")
    cmap = suitability_cmap()
    # avoid the extreme ends: the palest is kept off white so "0 of n" still shows on paper
    return [tuple(cmap(v)[:3]) for v in np.linspace(0.92, 0.05, n_models + 1)]


def year_cmap(n: int = 256) -> ListedColormap:
    """Sequential map for years: early dark, late pale (the suitability ramp's lightness path)."""
    return _lab_ramp("envelope_years", _SUITABILITY_ANCHORS[:4], n).with_extremes(bad=(0, 0, 0, 0))


def year_colours(n_years: int) -> list[tuple[float, float, float]]:
    """``n_years`` colours on the year ramp, early dark to late pale, evenly spaced in lightness."""
    if n_years < 1:
        from envelope.errors import InputError
        raise InputError(f"n_years: found {n_years}, expected at least 1")
    cmap = year_cmap()
    return [tuple(cmap(v)[:3]) for v in (np.linspace(0.0, 1.0, n_years) if n_years > 1 else [0.0])]


def as_linear_segmented(cmap: ListedColormap) -> LinearSegmentedColormap:
    """The same map as a :class:`~matplotlib.colors.LinearSegmentedColormap` (for tools that want one)."""
    return LinearSegmentedColormap.from_list(cmap.name, cmap.colors, N=cmap.N)
