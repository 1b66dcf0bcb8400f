"""Flat-detector geometry: where each pixel sits, its scattering angle, azimuth and q.

Lab frame: the X-ray beam travels along +z and the sample sits at the origin.
A pixel at (row, col) (pixel centres at integer indices, fractional values
allowed) has in-plane coordinates

    x_d = (col - col_c) * p_col,    y_d = (row - row_c) * p_row     (mm)

relative to the beam centre (row_c, col_c): the point where the direct beam
meets the detector. Its lab position is

    P = (0, 0, D) + R (x_d, y_d, 0)^T

with D the sample-to-beam-centre distance along the beam and R the detector
tilt. ``tilt_deg = (a, b)`` gives R = R_y(b) R_x(a): the detector is first
rotated by ``a`` about the lab x axis, then by ``b`` about the lab y axis
(active, right-handed rotations). Untilted, the detector columns run along +x
and the rows along +y. The beam centre stays on the beam for any tilt.

Scattering angle 2theta = angle between P and +z; azimuth phi = atan2(P_y, P_x),
measured from +x (the column direction) towards +y (the row direction).
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np

from ..xray import wavelength


@dataclass(frozen=True)
class Geometry:
    """Parameters of a flat detector.

    Attributes
    ----------
    shape : (int, int)
        Frame shape (ny, nx) in pixels.
    distance_mm : float
        Sample to beam-centre distance along the beam, mm.
    pixel_size_mm : (float, float)
        Pixel pitch along rows and along columns, (p_row, p_col), mm.
    beam_center_px : (float, float)
        Where the direct beam meets the detector, (row, col) in fractional
        pixel indices (pixel centres at integers).
    tilt_deg : (float, float)
        Rotations about the lab x axis, then the lab y axis, degrees.
    """

    shape: tuple
    distance_mm: float
    pixel_size_mm: tuple
    beam_center_px: tuple
    tilt_deg: tuple = (0.0, 0.0)

    def __post_init__(self):
        shape = tuple(int(v) for v in self.shape)
        if len(shape) != 2 or min(shape) < 1:
            raise ValueError(f"shape must be (ny, nx) with positive sizes, got {self.shape}")
        pix = np.broadcast_to(np.asarray(self.pixel_size_mm, dtype=float), (2,))
        if not (np.all(np.isfinite(pix)) and np.all(pix > 0)):
            raise ValueError(f"pixel_size_mm must be positive, got {self.pixel_size_mm}")
        if not (np.isfinite(self.distance_mm) and self.distance_mm > 0):
            raise ValueError(f"distance_mm must be positive, got {self.distance_mm}")
        centre = tuple(float(v) for v in self.beam_center_px)
        tilt = tuple(float(v) for v in self.tilt_deg)
        if len(centre) != 2 or len(tilt) != 2:
            raise ValueError("beam_center_px and tilt_deg take two values each")
        object.__setattr__(self, "shape", shape)
        object.__setattr__(self, "pixel_size_mm", (float(pix[0]), float(pix[1])))
        object.__setattr__(self, "beam_center_px", centre)
        object.__setattr__(self, "tilt_deg", tilt)
        object.__setattr__(self, "distance_mm", float(self.distance_mm))

    @property
    def pixel_area_mm2(self) -> float:
        """Area of one pixel, mm^2."""
        return self.pixel_size_mm[0] * self.pixel_size_mm[1]


def rotation(tilt_deg) -> np.ndarray:
    """Tilt rotation R = R_y(b) R_x(a) for ``tilt_deg = (a, b)``; (3, 3) float64."""
    a, b = np.deg2rad(np.asarray(tilt_deg, dtype=float))
    rx = np.array([[1.0, 0.0, 0.0], [0.0, np.cos(a), -np.sin(a)], [0.0, np.sin(a), np.cos(a)]])
    ry = np.array([[np.cos(b), 0.0, np.sin(b)], [0.0, 1.0, 0.0], [-np.sin(b), 0.0, np.cos(b)]])
    return ry @ rx


def normal(geometry: Geometry) -> np.ndarray:
    """Unit normal of the detector plane, n = R z; (3,) float64."""
    return rotation(geometry.tilt_deg)[:, 2]


def lab_positions(geometry: Geometry, rows=None, cols=None) -> np.ndarray:
    """Lab positions of points on the detector, mm.

    Parameters
    ----------
    geometry : Geometry
    rows, cols : array_like, optional
        Fractional pixel indices (broadcast together). Default: every pixel
        centre of the frame.

    Returns
    -------
    ndarray, float64, shape (..., 3)
        (P_x, P_y, P_z) in mm.
    """
    if rows is None and cols is None:
        rows, cols = np.indices(geometry.shape, dtype=float)
    rows, cols = np.broadcast_arrays(np.asarray(rows, dtype=float), np.asarray(cols, dtype=float))
    xd = (cols - geometry.beam_center_px[1]) * geometry.pixel_size_mm[1]
    yd = (rows - geometry.beam_center_px[0]) * geometry.pixel_size_mm[0]
    r = rotation(geometry.tilt_deg)
    pos = np.empty(rows.shape + (3,))
    pos[..., 0] = r[0, 0] * xd + r[0, 1] * yd
    pos[..., 1] = r[1, 0] * xd + r[1, 1] * yd
    pos[..., 2] = geometry.distance_mm + r[2, 0] * xd + r[2, 1] * yd
    return pos


def scattering_angles(geometry: Geometry, rows=None, cols=None):
    """Scattering angle 2theta and azimuth phi of detector points.

    Parameters
    ----------
    geometry : Geometry
    rows, cols : array_like, optional
        Fractional pixel indices; default every pixel centre.

    Returns
    -------
    two_theta, phi : ndarray, float64, shape (ny, nx) (or the broadcast shape)
        Radians; 2theta in [0, pi], phi in (-pi, pi].
    """
    if rows is None and cols is None:
        return _frame_angles(geometry)
    pos = lab_positions(geometry, rows, cols)
    radial = np.hypot(pos[..., 0], pos[..., 1])
    return np.arctan2(radial, pos[..., 2]), np.arctan2(pos[..., 1], pos[..., 0])


@functools.lru_cache(maxsize=2)
def _frame_angles(geometry: Geometry):
    """2theta and phi of every pixel centre, computed once per geometry (the set-up of a run asks
    for them several times: q map, corrections, sectors, geometry check); read-only."""
    pos = lab_positions(geometry)
    radial = np.hypot(pos[..., 0], pos[..., 1])
    two_theta, phi = np.arctan2(radial, pos[..., 2]), np.arctan2(pos[..., 1], pos[..., 0])
    two_theta.flags.writeable = phi.flags.writeable = False
    return two_theta, phi


def incidence_cosine(geometry: Geometry, rows=None, cols=None) -> np.ndarray:
    """Cosine of the angle between the scattered ray and the detector normal.

    Returns
    -------
    ndarray, float64, shape (ny, nx)
        (P . n) / |P|; 1 at the beam centre of an untilted detector.
    """
    pos = lab_positions(geometry, rows, cols)
    return pos @ normal(geometry) / np.linalg.norm(pos, axis=-1)


def q_map(geometry: Geometry, energy) -> np.ndarray:
    """Momentum transfer q = 4 pi sin(theta) / lambda of every pixel centre, 1/Å.

    Parameters
    ----------
    geometry : Geometry
    energy : float
        Photon energy, keV.

    Returns
    -------
    ndarray, float64, shape (ny, nx)
    """
    two_theta, _ = scattering_angles(geometry)
    return 4.0 * np.pi * np.sin(two_theta / 2.0) / wavelength(float(energy))


def beam_center_on_detector(geometry: Geometry) -> bool:
    """True when the beam centre lies on the frame, -0.5 <= index <= n - 0.5 on both axes."""
    (r, c), (ny, nx) = geometry.beam_center_px, geometry.shape
    return -0.5 <= r <= ny - 0.5 and -0.5 <= c <= nx - 0.5


def from_config(detector: dict, shape) -> Geometry:
    """Build the geometry from the validated ``detector`` config section.

    Parameters
    ----------
    detector : dict
        Keys ``distance_mm``, ``pixel_size_mm`` (one value or [row, col]),
        ``beam_center_px`` ([row, col] or null for the frame centre),
        ``tilt_deg`` ([about x, about y]).
    shape : (int, int)
        Frame shape (ny, nx) of the run.

    Raises
    ------
    ConfigError
        Naming the key, on a beam centre off the frame or values the geometry
        cannot use.
    """
    from ..errors import ConfigError

    ny, nx = (int(v) for v in shape)
    centre = detector.get("beam_center_px")
    if centre is None:
        centre = ((ny - 1) / 2.0, (nx - 1) / 2.0)
    pixel = detector["pixel_size_mm"]
    pixel = (pixel, pixel) if np.isscalar(pixel) else tuple(pixel)
    try:
        geometry = Geometry((ny, nx), detector["distance_mm"], pixel, tuple(centre),
                            tuple(detector.get("tilt_deg", (0.0, 0.0))))
    except ValueError as exc:
        raise ConfigError("detector", str(exc), "a usable detector geometry") from None
    if not beam_center_on_detector(geometry):
        raise ConfigError("detector.beam_center_px", f"[{centre[0]}, {centre[1]}]",
                          f"[row, col] on the frame of shape ({ny}, {nx}): "
                          f"-0.5 <= row <= {ny - 0.5} and -0.5 <= col <= {nx - 0.5}")
    return geometry
