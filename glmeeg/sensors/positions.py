"""Sensor positions: 10-10 electrode positions on a unit sphere.

Positions of 10-10 system electrodes on a unit sphere, built from the system's proportional
definition: the nasion-inion arc over the vertex and the left-right preauricular arc are divided
into 10 % steps (Fp 10 %, AF 20 %, F 30 %, FC 40 %, C 50 %, ... from the nasion), the outer ring
of electrodes (Fp1, F7, T7, P7, O1, ...) lies on the circumference at 10 % above the
nasion-inion line, and the electrodes of a row are spaced evenly along the great-circle arc from
the row's midline electrode to the row's outer-ring electrode. This is an idealised spherical
head; it is good for layout, interpolation and neighbour graphs, not for source modelling.

Coordinates: x towards the right ear, y towards the nasion, z towards the vertex.

The neighbour graph of sensors is in :mod:`glmeeg.sensors.neighbours`.

References
----------
.. [1] Jasper, H. H. (1958). The ten-twenty electrode system of the International Federation.
   Electroencephalography and Clinical Neurophysiology, 10, 371-375.
.. [2] Chatrian, G. E., Lettich, E., & Nelson, P. L. (1985). Ten percent electrode system for
   topographic studies of spontaneous and evoked EEG activities. American Journal of EEG
   Technology, 25, 83-92.
"""

from __future__ import annotations

import re

import numpy as np


__all__ = ["standard_position", "standard_positions"]

# Row prefix -> fraction of the nasion-inion arc from the nasion (midline electrode) and the
# azimuth (degrees from the front) of the row's electrode on the outer 10 % ring.
_ROWS: dict[str, tuple[float, float]] = {
    "FP": (0.1, 18.0), "AF": (0.2, 36.0), "F": (0.3, 54.0), "FC": (0.4, 72.0),
    "C": (0.5, 90.0), "CP": (0.6, 108.0), "P": (0.7, 126.0), "PO": (0.8, 144.0),
    "O": (0.9, 162.0),
}
# Outer-ring column of each row: the electrode number that sits on the 10 % ring.
_RING_COLUMN = {"FP": 1, "AF": 7, "F": 7, "FC": 7, "C": 7, "CP": 7, "P": 7, "PO": 7, "O": 1}
# Old names of the temporal electrodes.
_ALIASES = {"T3": "T7", "T4": "T8", "T5": "P7", "T6": "P8"}
_NAME = re.compile(r"^(FP|AF|FC|FT|CP|TP|PO|F|C|T|P|O)(Z|\d{1,2})$")


def _unit(theta_deg: float, azimuth_deg: float, left: bool) -> np.ndarray:
    th, az = np.radians(theta_deg), np.radians(azimuth_deg)
    x = np.sin(th) * np.sin(az) * (-1.0 if left else 1.0)
    return np.array([x, np.sin(th) * np.cos(az), np.cos(th)])


def _slerp(a: np.ndarray, b: np.ndarray, f: float) -> np.ndarray:
    omega = np.arccos(np.clip(a @ b, -1.0, 1.0))
    if omega < 1e-12:
        return a.copy()
    return (np.sin((1 - f) * omega) * a + np.sin(f * omega) * b) / np.sin(omega)


def standard_position(name: str) -> np.ndarray | None:
    """Unit-sphere position of a 10-10 electrode name, or ``None`` if the name is not one.

    Parameters
    ----------
    name : str
        Electrode name such as ``"Cz"``, ``"FC3"``, ``"Fp1"``, ``"T7"`` (old names T3-T6 are
        accepted). Case does not matter.

    Returns
    -------
    numpy.ndarray or None
        ``(x, y, z)`` on the unit sphere.

    Examples
    --------
    >>> (np.round(standard_position("Cz"), 6) + 0.0).tolist()  # + 0.0 turns -0.0 into 0.0
    [0.0, 0.0, 1.0]
    """
    key = _ALIASES.get(name.upper(), name.upper())
    m = _NAME.match(key)
    if m is None:
        return None
    row, col = m.groups()
    # FT and TP rows (FT7, TP8...) and the T row are on the outer ring only.
    if row in ("FT", "TP", "T"):
        azimuth = {"FT": 72.0, "T": 90.0, "TP": 108.0}[row]
        number = int(col) if col != "Z" else 0
        if number in (7, 8):
            return _unit(72.0, azimuth, left=number % 2 == 1)
        if number in (9, 10):
            return _unit(90.0, azimuth, left=number % 2 == 1)
        return None
    frac, ring_az = _ROWS[row]
    midline_theta = abs(frac - 0.5) * 180.0
    midline = _unit(midline_theta, 0.0 if frac < 0.5 else 180.0, left=False)
    if col == "Z":
        return midline
    number = int(col)
    left = number % 2 == 1
    ring_col = _RING_COLUMN[row] + (0 if left else 1)
    step = (number + 1) // 2  # 1, 2, 3 ... counted from the midline
    ring_step = (ring_col + 1) // 2
    ring_point = _unit(72.0, ring_az, left)
    if step == ring_step:
        return ring_point
    if step == ring_step + 1:  # F9, P10 ...: the row's point on the equator
        return _unit(90.0, ring_az, left)
    if step > ring_step + 1:
        return None
    return _slerp(midline, ring_point, step / ring_step)


def standard_positions(names: list[str] | tuple[str, ...]) -> np.ndarray:
    """Positions for several names; rows of NaN where a name is not a 10-10 electrode."""
    out = np.full((len(names), 3), np.nan)
    for i, n in enumerate(names):
        p = standard_position(n)
        if p is not None:
            out[i] = p
    return out
