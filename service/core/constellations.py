"""IAU constellation boundaries: membership, distance to the boundary, crossings, outlines.

The 88 IAU constellations are bounded by arcs of constant right ascension and declination
for the equinox B1875.0 (Delporte 1930), tabulated for machine lookup by Roman (1987). This
module loads that table once, turns it into an exact rectilinear cell grid on the B1875.0
sphere, and answers, for arrays of positions:

* which constellation contains each position, after reduction to equinox B1875.0 in one of
  the ways of :data:`REDUCTIONS`: the FK4 system at equinox B1875.0 (default, the system the
  boundaries were drawn in), or FK5 precessed to B1875.0 (IAU 2006 precession, as
  general-purpose libraries do, or the IAU 1976 precession of the FK5 system itself);
* the angular distance to the nearest boundary arc and the constellation on its far side;
* every epoch at which a star in straight-line space motion crosses a boundary;
* the outline of a constellation as a densified polygon in a chosen frame, as GeoJSON.

Everything is vectorised: inputs broadcast, scalar in gives scalar-shaped out.

References
----------
1. Delporte, E. 1930, Delimitation scientifique des constellations (Cambridge University
   Press): boundaries along B1875.0 hour circles and parallels.
2. Roman, N. G. 1987, PASP 99, 695, "Identification of a constellation from a position";
   CDS catalogue VI/42 (file data.dat and the ReadMe with its test positions).
3. Murray, C. A. 1989, A&A 218, 325, eqs. 28-29: FK4 (B1950, no E-terms) to FK5 (J2000)
   rotation, with the correction for FK4 being a rotating system.
4. Mignard, F. & Froeschle, M. 2000, A&A 354, 732 (via ERFA ``fk5hip``): FK5 to ICRS
   (Hipparcos) orientation.
5. Lieske, J. H. et al. 1977, A&A 58, 1 (via ERFA ``pmat76``): IAU 1976 precession;
   Capitaine, N. et al. 2003, A&A 412, 567 and Hilton, J. L. et al. 2006, Celest. Mech.
   Dyn. Astron. 94, 351 (via ERFA ``bp06``): IAU 2006 precession.
6. Seidelmann, P. K. (ed.) 1992, Explanatory Supplement to the Astronomical Almanac,
   section 3.531 (E-terms of aberration; FK4 precession with Newcomb's angles).
7. ESA 1997, The Hipparcos and Tycho Catalogues, Vol. 1, section 1.5.5: straight-line
   (rigorous linear) space motion.
8. Butler, H. et al. 2016, RFC 7946 "The GeoJSON Format", sections 3.1.6 (Polygon),
   3.1.9 (antimeridian cutting), 4 (longitude, latitude in decimal degrees).
"""

from __future__ import annotations

import dataclasses
import enum
import functools
import hashlib
import math
from importlib import resources

import erfa
import numpy as np

from service.core.constants import (
    ARCSEC_PER_RAD,
    AU_PER_JULIAN_YEAR_KM_S,
    DEG_PER_RAD,
    JD_B1900,
    JD_J2000,
    JULIAN_YEAR_DAYS,
    MAS_PER_RAD,
    PC_AU,
    RAD_PER_DEG,
    TROPICAL_YEAR_DAYS_LIESKE1979,
)
from service.core.floating import overflow_to_infinity
from service.core.propagation import AT_POLE_RAD, propagate_standard

# ---------------------------------------------------------------------------------------
# Constants specific to this module (unit and source beside each)
# ---------------------------------------------------------------------------------------

#: File names (package data under service/data) and their SHA-256 checksums. The boundary
#: table is Roman (1987), CDS VI/42 data.dat, with declinations and right ascensions as
#: decimal numbers rounded to 1e-4 (see service/data/PROVENANCE.md).
BOUNDARY_TABLE_FILE = "constellation_boundaries_roman1987.dat"
BOUNDARY_TABLE_SHA256 = "daf9e2b39ec57446d862a445276ae2ea50490ee455540972906098f5f9187957"
NAMES_FILE = "constellation_names_iau.dat"
NAMES_SHA256 = "2fba80ded424cd3e915bb281aa89436bac6d3c7c4ebddacc1c067d9366d0e66a"

#: Besselian epoch of the boundary equinox, B1875.0 (Delporte 1930).
BOUNDARY_BESSELIAN_EPOCH = 1875.0

#: Julian date (TT) of B1875.0 from the Besselian-epoch definition of Lieske (1979):
#: JD = 2415020.31352 + (B - 1900) * 365.242198781.
JD_B1875 = JD_B1900 + (BOUNDARY_BESSELIAN_EPOCH - 1900.0) * TROPICAL_YEAR_DAYS_LIESKE1979

#: Half a unit of the last tabulated digit: the table gives RA in hours and Dec in degrees
#: rounded to 1e-4 (Roman 1987; 86 deg 10 arcmin appears as 86.1667, 6h14m30s as 6.2417).
TABLE_RA_HALF_UNIT_H = 0.5e-4
TABLE_DEC_HALF_UNIT_DEG = 0.5e-4
#: The same as angles on the sky: 0.18 arcsec in declination; 2.7 arcsec * cos(dec) in RA.
TABLE_DEC_HALF_UNIT_ARCSEC = TABLE_DEC_HALF_UNIT_DEG * 3600.0
TABLE_RA_HALF_UNIT_ARCSEC_AT_EQUATOR = TABLE_RA_HALF_UNIT_H * 15.0 * 3600.0

#: Default distance (arcsec) within which a position is flagged as near a boundary.
DEFAULT_NEAR_BOUNDARY_ARCSEC = 1.0

#: Largest distance from the reference epoch (Julian years) for a crossing search window.
MAX_CROSSING_WINDOW_YR = 100_000.0
#: Smallest sampling step accepted for a crossing search, Julian years (one day).
MIN_CROSSING_STEP_YR = 1.0 / JULIAN_YEAR_DAYS
#: Precision to which crossing epochs are located, days, and in Julian years.
CROSSING_EPOCH_TOLERANCE_DAYS = 1e-4
CROSSING_EPOCH_TOLERANCE_YR = CROSSING_EPOCH_TOLERANCE_DAYS / JULIAN_YEAR_DAYS
#: Shortest step taken when a star sits on a boundary (1e-3 day): two crossings closer in
#: time than this may be reported as one or none (Note 4 of :func:`boundary_crossings`).
CROSSING_MIN_STEP_YR = 1e-3 / JULIAN_YEAR_DAYS
#: Relative allowance for the non-rotational part of the FK4 reduction (E-terms, about
#: 1.7e-6 rad in size) when bounding angular motion in the B1875 frame; 1e-5 covers it.
FK4_DISTORTION_ALLOWANCE = 1e-5

#: Murray (1989), A&A 218, 325, eq. 28: rotation from FK4 B1950.0 (no E-terms) to FK5
#: J2000.0, and eq. 29: the time-dependent correction for FK4 being a rotating system,
#: per Julian century from 1950.0 (the same numbers as astropy's FK4-FK5 transform).
_FK4_B1950_TO_FK5_J2000_MURRAY1989 = np.array(
    [
        [0.9999256794956877, -0.0111814832204662, -0.0048590038153592],
        [0.0111814832391717, +0.9999374848933135, -0.0000271625947142],
        [0.0048590037723143, -0.0000271702937440, +0.9999881946023742],
    ]
)
_FK4_ROTATION_CORRECTION_PER_CENTURY_MURRAY1989 = 1.0e-6 * np.array(
    [
        [-0.0026455262, -1.1539918689, +2.1111346190],
        [+1.1540628161, -0.0129042997, +0.0236021478],
        [-2.1112979048, -0.0056024448, +0.0102587734],
    ]
)

#: Constant of aberration, degrees (Explanatory Supplement 1992; 20.49552 arcsec).
_ABERRATION_CONSTANT_DEG = 0.0056932
#: Julian date of B1950.0 (Lieske 1979 Besselian epoch definition).
_JD_B1950 = JD_B1900 + 50.0 * TROPICAL_YEAR_DAYS_LIESKE1979

#: The reductions to equinox B1875.0 offered (Notes of :func:`icrs_to_b1875`): the FK4
#: system (default), FK5 precessed as general-purpose libraries do (IAU 2006 precession),
#: and FK5 precessed with the IAU 1976 precession that defines the FK5 system.
REDUCTIONS = ("fk4", "fk5", "fk5_iau1976")
#: Output frames offered for outlines.
OUTLINE_FRAMES = ("icrs", "galactic", "fk5", "fk4", "b1875")


class ConstellationFlag(enum.IntFlag):
    """Per-star flags of the constellation functions (bit values are stable)."""

    #: Within the requested distance (default 1 arcsec) of a boundary, or within the
    #: table's rounding of a boundary (see TABLE_ROUNDING_AMBIGUOUS).
    NEAR_BOUNDARY = 1
    #: Within half a unit of the table's last digit of a boundary (0.18 arcsec in Dec,
    #: 2.7 arcsec * cos(dec) in RA): the published table cannot decide this position.
    TABLE_ROUNDING_AMBIGUOUS = 2
    #: The FK4 and the FK5 reductions to B1875.0 give different constellations.
    REDUCTIONS_DISAGREE = 4
    #: Parallax missing: motion propagated as direction only (no perspective effects, radial
    #: velocity not used).
    PARALLAX_MISSING = 8
    #: Parallax zero or negative: no distance; motion propagated as without a parallax.
    #: Not also PARALLAX_MISSING, as in the propagation and velocity answers.
    PARALLAX_NOT_POSITIVE = 16
    #: Radial velocity missing: taken as zero for the propagation.
    RADIAL_VELOCITY_MISSING = 32
    #: Proper motion missing: the position was taken as fixed.
    PROPER_MOTION_MISSING = 64
    #: Crossing search stopped at its iteration limit before the end of the window.
    SEARCH_INCOMPLETE = 128
    #: Position given within AT_POLE_RAD (service.core.propagation) of a celestial pole and
    #: moved by a proper motion: the components lie along the east and north of the RA
    #: given, which sets the direction of the motion (and so the constellation reached).
    AT_POLE = 256


# ---------------------------------------------------------------------------------------
# The table
# ---------------------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True)
class BoundaryTable:
    """The Roman (1987) table and the exact cell grid built from it (read-only).

    Attributes
    ----------
    abbreviations, names : tuple of str, length 88
        IAU abbreviations and names, alphabetical by name as in the names file.
    ra_low_h, ra_high_h, dec_low_deg : ndarray, shape (357,)
        The table rows: RA range (hours, equinox B1875.0) and lower declination (degrees).
    row_index : ndarray of int, shape (357,)
        Constellation index (into ``abbreviations``) of each row.
    ra_edges_h : ndarray, shape (M+1,)
        Sorted distinct RA values of the table, 0 and 24 included.
    dec_edges_deg : ndarray, shape (K+1,)
        Sorted distinct declinations, -90 and 90 included.
    cell_index : ndarray of int16, shape (K, M)
        Constellation of each grid cell [dec band, RA band].
    area_sr : ndarray, shape (88,)
        Exact solid angle of each constellation on the B1875.0 sphere, steradians.
    """

    abbreviations: tuple
    names: tuple
    ra_low_h: np.ndarray
    ra_high_h: np.ndarray
    dec_low_deg: np.ndarray
    row_index: np.ndarray
    ra_edges_h: np.ndarray
    dec_edges_deg: np.ndarray
    cell_index: np.ndarray
    area_sr: np.ndarray


def _read_package_text(name: str, sha256: str) -> str:
    raw = resources.files("service").joinpath("data", name).read_bytes()
    digest = hashlib.sha256(raw).hexdigest()
    if digest != sha256:
        raise RuntimeError(f"package data file {name} has checksum {digest}, expected {sha256}")
    return raw.decode("utf-8")


def _scan_table(ra_h, dec_deg, ra_low, ra_high, dec_low, row_index):
    """Roman (1987) lookup by reading down the table (slow reference; Note 1 of locate)."""
    ra_h, dec_deg = np.broadcast_arrays(np.asarray(ra_h, float), np.asarray(dec_deg, float))
    out = np.full(ra_h.shape, -1, dtype=np.int16)
    for lo, hi, de, idx in zip(ra_low, ra_high, dec_low, row_index, strict=True):
        hit = (out < 0) & (ra_h >= lo) & (ra_h < hi) & (dec_deg >= de)
        out[hit] = idx
    return out


@functools.cache
def boundary_table() -> BoundaryTable:
    """Load the boundary table and the names once; build the cell grid.

    Returns
    -------
    BoundaryTable
        Cached: later calls return the same object.

    Notes
    -----
    1. Both files are package data checked against their SHA-256 checksums
       (:data:`BOUNDARY_TABLE_SHA256`, :data:`NAMES_SHA256`); a mismatch raises.
    2. Every RA and Dec value of the table is an edge of the grid, so each grid cell lies
       wholly inside one constellation; the cell's constellation is found by Roman's
       procedure (read down the table) at the cell centre. Lookups by grid cell therefore
       give exactly the table's answer, including its half-open conventions
       (RA_low <= RA < RA_high, Dec >= Dec_low).

    References
    ----------
    Roman (1987), CDS VI/42 ReadMe (description of data.dat and of the lookup procedure).
    """
    names_text = _read_package_text(NAMES_FILE, NAMES_SHA256)
    abbreviations, names = [], []
    for line in names_text.splitlines():
        if line.strip():
            abbreviations.append(line[:3])
            names.append(line[4:].strip())
    position = {a: i for i, a in enumerate(abbreviations)}

    table_text = _read_package_text(BOUNDARY_TABLE_FILE, BOUNDARY_TABLE_SHA256)
    rows = [line.split() for line in table_text.splitlines() if line.strip()]
    ra_low = np.array([float(r[0]) for r in rows])
    ra_high = np.array([float(r[1]) for r in rows])
    dec_low = np.array([float(r[2]) for r in rows])
    row_index = np.array([position[r[3]] for r in rows], dtype=np.int16)

    ra_edges = np.unique(np.concatenate([ra_low, ra_high, [0.0, 24.0]]))
    dec_edges = np.unique(np.concatenate([dec_low, [-90.0, 90.0]]))
    ra_mid = 0.5 * (ra_edges[1:] + ra_edges[:-1])
    dec_mid = 0.5 * (dec_edges[1:] + dec_edges[:-1])
    cell = _scan_table(
        ra_mid[None, :], dec_mid[:, None], ra_low, ra_high, dec_low, row_index
    ).astype(np.int16)
    if np.any(cell < 0):
        raise RuntimeError("boundary table leaves part of the sphere unassigned")

    dsin = np.diff(np.sin(dec_edges * RAD_PER_DEG))[:, None]
    dra = np.diff(ra_edges)[None, :] * (math.pi / 12.0)
    area = np.bincount(cell.ravel(), weights=(dsin * dra).ravel(), minlength=len(names))

    for arr in (ra_low, ra_high, dec_low, row_index, ra_edges, dec_edges, cell, area):
        arr.setflags(write=False)
    return BoundaryTable(
        abbreviations=tuple(abbreviations),
        names=tuple(names),
        ra_low_h=ra_low,
        ra_high_h=ra_high,
        dec_low_deg=dec_low,
        row_index=row_index,
        ra_edges_h=ra_edges,
        dec_edges_deg=dec_edges,
        cell_index=cell,
        area_sr=area,
    )


def warm_up() -> None:
    """Load the table and build every cached index now (about a second, once a process)."""
    boundary_table()
    _grid_tables()
    _flat_cells()
    _segments()
    _segment_attributes()
    _margin_index()
    _index_z_lut()
    _quick_lut()
    _segment_side_sum()


def constellation_index(abbreviation: str) -> int:
    """Index of a constellation from its IAU abbreviation (case-insensitive).

    Raises
    ------
    KeyError
        If the abbreviation is not one of the 88.
    """
    table = boundary_table()
    lowered = [a.lower() for a in table.abbreviations]
    try:
        return lowered.index(str(abbreviation).strip().lower())
    except ValueError:
        raise KeyError(abbreviation) from None


# ---------------------------------------------------------------------------------------
# Reductions to equinox B1875.0
# ---------------------------------------------------------------------------------------


def _unit_vectors(ra_deg, dec_deg):
    ra = np.asarray(ra_deg, dtype=float) * RAD_PER_DEG
    dec = np.asarray(dec_deg, dtype=float) * RAD_PER_DEG
    ra, dec = np.broadcast_arrays(ra, dec)
    out = np.empty((*ra.shape, 3))
    cd = np.cos(dec)
    np.multiply(cd, np.cos(ra), out=out[..., 0])
    np.multiply(cd, np.sin(ra), out=out[..., 1])
    np.sin(dec, out=out[..., 2])
    return out


def _angles_deg(vec):
    x, y, z = vec[..., 0], vec[..., 1], vec[..., 2]
    ra = np.arctan2(y, x) * DEG_PER_RAD
    ra = ra + np.where(ra < 0.0, 360.0, 0.0)
    ra = np.where(ra >= 360.0, 0.0, ra)
    dec = np.arctan2(z, np.hypot(x, y)) * DEG_PER_RAD
    return ra, dec


def _apply(matrix, vec):
    return vec @ matrix.T


def _rotation(axis: int, angle_rad: float) -> np.ndarray:
    """Frame rotation matrix about axis 0/1/2 (x/y/z), as ERFA ``rx``/``ry``/``rz``."""
    c, s = math.cos(angle_rad), math.sin(angle_rad)
    m = np.eye(3)
    i, j = [(1, 2), (2, 0), (0, 1)][axis]
    m[i, i] = c
    m[j, j] = c
    m[i, j] = s
    m[j, i] = -s
    return m


def julian_epoch_to_jd(epoch_jyear):
    """Julian date (TDB/TT) of a Julian epoch: JD = 2451545.0 + (J - 2000) * 365.25."""
    return JD_J2000 + (np.asarray(epoch_jyear, dtype=float) - 2000.0) * JULIAN_YEAR_DAYS


def besselian_epoch_to_jd(epoch_byear):
    """Julian date of a Besselian epoch (Lieske 1979; ERFA ``epb2jd``)."""
    return JD_B1900 + (np.asarray(epoch_byear, dtype=float) - 1900.0) * (
        TROPICAL_YEAR_DAYS_LIESKE1979
    )


def _newcomb_precession_matrix(byear_from: float, byear_to: float) -> np.ndarray:
    """FK4 (Newcomb) precession matrix between two Besselian equinoxes.

    Notes
    -----
    1. Newcomb's angles zeta_A, z_A, theta_A as cubic polynomials in tropical millennia
       from 1850 (Andoyer's form), as tabulated in the Explanatory Supplement (1992),
       section 3.214 (from memory), and used identically by astropy's FK4 frames.
    """
    t1 = (byear_from - 1850.0) / 1000.0
    dt = (byear_to - 1850.0) / 1000.0 - t1
    zeta1 = (0.060 * t1 + 139.720) * t1 + 23035.545
    zeta = ((17.995 * dt + (-0.27 * t1 + 30.240)) * dt + zeta1) * dt / ARCSEC_PER_RAD
    z = ((18.325 * dt + (109.480 + 0.39 * t1)) * dt + zeta1) * dt / ARCSEC_PER_RAD
    theta1 = (-0.37 * t1 - 85.29) * t1 + 20051.12
    theta = ((-41.8 * dt + (-0.37 * t1 - 42.65)) * dt + theta1) * dt / ARCSEC_PER_RAD
    return _rotation(2, -z) @ _rotation(1, theta) @ _rotation(2, -zeta)


def _fk4_e_terms(byear: float) -> np.ndarray:
    """E-terms of aberration vector (dimensionless) for a Besselian equinox.

    Notes
    -----
    1. Eccentricity and longitude of perigee of the solar orbit as polynomials in Julian
       centuries from B1950.0; obliquity from IAU 1980 (ERFA ``obl80``). Explanatory
       Supplement (1992), section 3.531 (the same expressions as astropy's FK4 frame).
    """
    jd = float(besselian_epoch_to_jd(byear))
    t = (jd - _JD_B1950) / 36525.0
    ek = math.radians(_ABERRATION_CONSTANT_DEG) * ((-0.000000126 * t - 0.00004193) * t + 0.01673011)
    g = math.radians((((0.012 * t + 1.65) * t + 6190.67) * t + 1015489.951) / 3600.0)
    obliquity = float(erfa.obl80(jd, 0.0))
    return np.array(
        [
            ek * math.sin(g),
            -ek * math.cos(g) * math.cos(obliquity),
            -ek * math.cos(g) * math.sin(obliquity),
        ]
    )


def _add_e_terms(vec, e_terms):
    """Catalogue FK4 direction from a direction without E-terms (unit vectors).

    The usual fixed-point form p = (u + E) / (1 + E.p) only rescales u + E, so the unit
    vector is exactly (u + E) / |u + E|.
    """
    out = vec + e_terms
    return out / np.sqrt(np.einsum("...i,...i->...", out, out))[..., None]


def _remove_e_terms(vec, e_terms):
    """Exact inverse of :func:`_add_e_terms`: the unit u with u + E parallel to ``vec``.

    u = lambda w - E with |u| = 1 gives lambda = w.E + sqrt((w.E)^2 + 1 - |E|^2).
    """
    we = vec @ e_terms
    lam = we + np.sqrt(we * we + 1.0 - float(e_terms @ e_terms))
    return lam[..., None] * vec - e_terms


@functools.cache
def _icrs_to_fk5_j2000() -> np.ndarray:
    r5h, _ = erfa.fk5hip()  # FK5 -> Hipparcos (ICRS) orientation, Mignard & Froeschle 2000
    return np.ascontiguousarray(r5h.T)


#: Rotation matrices kept per process and per kind of rotation (FK5 IAU 1976, FK5 IAU 2006,
#: FK4), the least recently used dropped first. Bounded: an outline's equinox is the
#: client's choice ("now" is a new one every request), so an unbounded cache would grow for
#: the worker's whole life. A miss costs one precession matrix, microseconds.
ROTATION_CACHE_SIZE = 256


@functools.lru_cache(maxsize=ROTATION_CACHE_SIZE)
def _fk5_rotation(julian_equinox: float) -> np.ndarray:
    """ICRS -> FK5 at a Julian equinox: frame tie, then IAU 1976 precession from J2000."""
    jd = float(julian_epoch_to_jd(julian_equinox))
    return erfa.pmat76(jd, 0.0) @ _icrs_to_fk5_j2000()


@functools.lru_cache(maxsize=ROTATION_CACHE_SIZE)
def _fk5_rotation_iau2006(julian_equinox: float) -> np.ndarray:
    """ICRS -> FK5 J2000 frame tie, then IAU 2006 precession (ERFA ``bp06``) to an equinox."""
    jd = float(julian_epoch_to_jd(julian_equinox))
    return erfa.bp06(jd, 0.0)[1] @ _icrs_to_fk5_j2000()


@functools.lru_cache(maxsize=ROTATION_CACHE_SIZE)
def _fk4_rotation(besselian_equinox: float, besselian_epoch: float) -> np.ndarray:
    """ICRS -> FK4 (no E-terms) at a Besselian equinox, FK4 realised at an epoch."""
    jyear = float(erfa.epj(float(besselian_epoch_to_jd(besselian_epoch)), 0.0))
    b = (
        _FK4_B1950_TO_FK5_J2000_MURRAY1989
        + _FK4_ROTATION_CORRECTION_PER_CENTURY_MURRAY1989 * (jyear - 1950.0) / 100.0
    )
    return _newcomb_precession_matrix(1950.0, besselian_equinox) @ b.T @ _icrs_to_fk5_j2000()


@functools.cache
def _b1875_e_terms() -> np.ndarray:
    return _fk4_e_terms(BOUNDARY_BESSELIAN_EPOCH)


def icrs_to_b1875(vec, reduction: str = "fk4"):
    """Unit vectors in ICRS to unit vectors at equinox B1875.0.

    Parameters
    ----------
    vec : array_like, shape (..., 3)
        ICRS unit vectors (dimensionless).
    reduction : {"fk4", "fk5", "fk5_iau1976"}
        "fk4": FK4 system at equinox and epoch B1875.0, E-terms included (Note 1).
        "fk5": FK5 J2000.0 precessed to B1875.0 with the IAU 2006 precession (Note 2).
        "fk5_iau1976": the same with the IAU 1976 precession (Note 2).

    Returns
    -------
    ndarray, shape (..., 3)
        Unit vectors in the B1875.0 frame of the reduction.

    Notes
    -----
    1. ICRS -> FK5 J2000.0 (frame tie of Mignard & Froeschle 2000, ERFA ``fk5hip``) ->
       FK4 B1950.0 without E-terms (Murray 1989 eqs. 28-29, the FK4 rotation correction
       evaluated at epoch B1875.0, so the boundaries are fixed on the sky as the FK4 system
       realised them at B1875.0) -> Newcomb precession to B1875.0 -> E-terms of B1875.0
       added (catalogue FK4 places contain them). This equals astropy's
       ``FK4(equinox="B1875")`` whose default obstime is the equinox.
    2. The FK5 reductions are single rotations: frame tie, then precession from J2000.0 to
       the date of B1875.0, either IAU 2006 (Capitaine et al. 2003, Hilton et al. 2006;
       ERFA ``bp06``), which is what general-purpose libraries apply to FK5 (astropy's
       ``FK5(equinox="B1875")``), or IAU 1976 (Lieske et al. 1977; ERFA ``pmat76``), the
       precession the FK5 system was built with. The two precessions differ by 0.37 arcsec
       at B1875.0.
    3. The FK4 and FK5 reductions differ by up to about 0.5 arcsec (FK4 system rotation
       and E-terms); see ConstellationFlag.REDUCTIONS_DISAGREE.
    """
    vec = np.asarray(vec, dtype=float)
    if reduction == "fk4":
        out = _apply(_fk4_rotation(BOUNDARY_BESSELIAN_EPOCH, BOUNDARY_BESSELIAN_EPOCH), vec)
        return _add_e_terms(out, _b1875_e_terms())
    return _apply(_reduction_rotation(reduction), vec)


def _reduction_rotation(reduction: str) -> np.ndarray:
    """The rotation part of a reduction to B1875.0 (for FK4: before the E-terms)."""
    if reduction == "fk4":
        return _fk4_rotation(BOUNDARY_BESSELIAN_EPOCH, BOUNDARY_BESSELIAN_EPOCH)
    if reduction == "fk5":
        return _fk5_rotation_iau2006(float(erfa.epj(JD_B1875, 0.0)))
    if reduction == "fk5_iau1976":
        return _fk5_rotation(float(erfa.epj(JD_B1875, 0.0)))
    raise ValueError(f"reduction must be one of {REDUCTIONS}, not {reduction!r}")


def b1875_to_icrs(vec, reduction: str = "fk4"):
    """Inverse of :func:`icrs_to_b1875` (unit vectors, shape (..., 3))."""
    vec = np.asarray(vec, dtype=float)
    if reduction == "fk4":
        vec = _remove_e_terms(vec, _b1875_e_terms())
    return vec @ _reduction_rotation(reduction)


def _uniform_lut(edges):
    """Bins narrower than half the closest pair of edges, each mapped to its first edge."""
    width = 0.5 * float(np.min(np.diff(edges)))
    nbin = int(math.ceil((edges[-1] - edges[0]) / width)) + 1
    starts = edges[0] + width * np.arange(nbin)
    first = np.clip(np.searchsorted(edges, starts, side="right") - 1, 0, edges.size - 2)
    first = first.astype(np.intp)
    padded = np.concatenate([edges, [np.inf]])
    for arr in (first, padded):
        arr.setflags(write=False)
    return (float(edges[0]), 1.0 / width, first, padded, edges.size - 2)


@functools.cache
def _grid_tables():
    """Look-up tables into the RA edges (hours) and into sin(Dec edges)."""
    table = boundary_table()
    sin_edges = np.sin(table.dec_edges_deg * RAD_PER_DEG)
    sin_edges[0], sin_edges[-1] = -1.0, 1.0
    return _uniform_lut(table.ra_edges_h), _uniform_lut(sin_edges)


def _edge_index(values, lut):
    """``searchsorted(edges, values, side="right") - 1``, clipped, by uniform bins."""
    origin, inv_width, first, padded, last = lut
    # take's "clip" mode clips the bin numbers into the table (as np.clip would, cheaper)
    idx = first.take(((values - origin) * inv_width).astype(np.intp), mode="clip")
    idx += values >= padded.take(idx + 1)  # bins are narrower than edge gaps: one step at most
    return np.minimum(idx, last)


def _ra_hours(vec):
    ra_h = np.arctan2(vec[..., 1], vec[..., 0]) * (12.0 / math.pi)
    ra_h += np.where(ra_h < 0.0, 24.0, 0.0)
    return ra_h


def _grid_lookup_vectors(vec, ra_h=None):
    """Constellation index of B1875.0 unit vectors (N, 3) by grid cell.

    Notes
    -----
    1. Exactly the table's answer (Note 2 of :func:`boundary_table`): the RA band comes
       from the RA in hours, the Dec band from z = sin(dec) against sin of the edges.
    """
    table = boundary_table()
    ra_lut, z_lut = _grid_tables()
    if ra_h is None:
        ra_h = _ra_hours(vec)
    i = _edge_index(ra_h, ra_lut)
    j = _edge_index(vec[..., 2], z_lut)
    return table.cell_index[j, i]


def _grid_lookup(ra_deg, dec_deg):
    """Constellation index of B1875.0 positions given in degrees."""
    return _grid_lookup_vectors(_unit_vectors(ra_deg, dec_deg))


@dataclasses.dataclass(frozen=True)
class _Segments:
    """Boundary arcs: constant-Dec arcs (kind 0) and constant-RA arcs (kind 1), radians.

    Kind 0: dec = c, RA from lo to hi (lo < hi). Kind 1: RA = c, Dec from lo to hi.
    ``left``/``right`` are the constellations south/north (kind 0) or west/east (kind 1).
    """

    kind: np.ndarray
    c: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    left: np.ndarray
    right: np.ndarray
    cos_c: np.ndarray
    sin_c: np.ndarray
    end1: np.ndarray  # unit vector of the (lo) end, shape (S, 3)
    end2: np.ndarray  # unit vector of the (hi) end


def _elementary_edges():
    """All grid edges between cells of different constellations (grid indices)."""
    table = boundary_table()
    cell = table.cell_index
    nd, nr = cell.shape
    # constant-Dec edges at dec_edges[j], j = 1..nd-1, RA band i
    jj, ii = np.nonzero(cell[1:, :] != cell[:-1, :])
    h = (jj + 1, ii, cell[jj, ii], cell[jj + 1, ii])  # (j, i, south, north)
    # constant-RA edges at ra_edges[i] (i = 0..nr-1, west cell is i-1 mod nr), Dec band j
    west = np.roll(cell, 1, axis=1)
    jj, ii = np.nonzero(west != cell)
    v = (jj, ii, west[jj, ii], cell[jj, ii])  # (j, i, west, east)
    return h, v


@functools.cache
def _segments() -> _Segments:
    """Merge collinear elementary edges with the same two sides into segments."""
    table = boundary_table()
    ra_e = table.ra_edges_h * (math.pi / 12.0)
    dec_e = table.dec_edges_deg * RAD_PER_DEG
    (hj, hi, hs, hn), (vj, vi, vw, ve) = _elementary_edges()
    kinds, cs, los, his, lefts, rights = [], [], [], [], [], []

    order = np.lexsort((hi, hj))
    prev = None
    for j, i, s, n in zip(hj[order], hi[order], hs[order], hn[order], strict=True):
        key = (j, s, n)
        if prev is not None and prev[0] == key and prev[1] == i:
            his[-1] = ra_e[i + 1]
        else:
            kinds.append(0)
            cs.append(dec_e[j])
            los.append(ra_e[i])
            his.append(ra_e[i + 1])
            lefts.append(s)
            rights.append(n)
        prev = (key, i + 1)

    order = np.lexsort((vj, vi))
    prev = None
    for j, i, w, e in zip(vj[order], vi[order], vw[order], ve[order], strict=True):
        key = (i, w, e)
        if prev is not None and prev[0] == key and prev[1] == j:
            his[-1] = dec_e[j + 1]
        else:
            kinds.append(1)
            cs.append(ra_e[i])
            los.append(dec_e[j])
            his.append(dec_e[j + 1])
            lefts.append(w)
            rights.append(e)
        prev = (key, j + 1)

    kind = np.array(kinds, dtype=np.int8)
    c, lo, hi = np.array(cs), np.array(los), np.array(his)
    ra1 = np.where(kind == 0, lo, c)
    ra2 = np.where(kind == 0, hi, c)
    dec1 = np.where(kind == 0, c, lo)
    dec2 = np.where(kind == 0, c, hi)
    arrays = [
        kind,
        c,
        lo,
        hi,
        np.array(lefts, dtype=np.int16),
        np.array(rights, dtype=np.int16),
        np.cos(c),
        np.sin(c),
        _unit_vectors(ra1 * DEG_PER_RAD, dec1 * DEG_PER_RAD),
        _unit_vectors(ra2 * DEG_PER_RAD, dec2 * DEG_PER_RAD),
    ]
    for a in arrays:
        a.setflags(write=False)
    return _Segments(*arrays)


def _gc_distance(ra1, dec1, ra2, dec2):
    """Great-circle distance (rad) by the haversine-free atan2 form (well conditioned)."""
    dra = ra2 - ra1
    c1, c2 = np.cos(dec1), np.cos(dec2)
    s1, s2 = np.sin(dec1), np.sin(dec2)
    x = c1 * c2 * np.cos(dra) + s1 * s2
    cy = c2 * np.sin(dra)
    cz = c1 * s2 - s1 * c2 * np.cos(dra)
    return np.arctan2(np.hypot(cy, cz), x)


def _segment_distance(p, ra, dec, seg_index, segs: _Segments):
    """Distance (rad) on the sphere from points to segments, pairwise.

    Parameters
    ----------
    p : ndarray, shape (M, 3)
        Unit vectors of the points (B1875.0 frame).
    ra, dec : ndarray, shape (M,)
        The same points, radians.
    seg_index : ndarray of int, shape (M,)
        Segment paired with each point.

    Notes
    -----
    1. Constant-Dec arc (a small circle): the nearest point of the full parallel lies on
       the point's own hour circle, at distance |dec - c|; if the point's RA is outside the
       arc, the distance grows with the RA offset, so the nearer end point is the nearest.
    2. Constant-RA arc (part of a great circle through the poles): the dot product with
       the meridian point at declination phi is R cos(phi - phi0) with
       phi0 = atan2(sin dec, cos dec cos dRA); if phi0 lies on the arc the distance is
       asin(|sin dRA| cos dec), the distance to the meridian's plane, else the nearer end
       point is the nearest.
    3. End-point distances use the chord form 2 asin(|p - e| / 2), well conditioned at
       small angles.
    """
    kind = segs.kind[seg_index]
    out = np.empty(seg_index.shape)
    inside = np.zeros(seg_index.shape, dtype=bool)

    h = np.flatnonzero(kind == 0)
    if h.size:
        s = seg_index[h]
        offset = np.mod(ra[h] - segs.lo[s], 2.0 * math.pi)
        ok = offset <= segs.hi[s] - segs.lo[s]
        hin = h[ok]
        out[hin] = np.abs(dec[hin] - segs.c[seg_index[hin]])
        inside[hin] = True
    v = np.flatnonzero(kind == 1)
    if v.size:
        s = seg_index[v]
        x, y, z = p[v, 0], p[v, 1], p[v, 2]
        cc, sc = segs.cos_c[s], segs.sin_c[s]
        across = np.abs(y * cc - x * sc)
        phi0 = np.arctan2(z, x * cc + y * sc)
        ok = (phi0 >= segs.lo[s]) & (phi0 <= segs.hi[s])
        vin = v[ok]
        out[vin] = np.arcsin(np.minimum(across[ok], 1.0))
        inside[vin] = True
    rest = np.flatnonzero(~inside)
    if rest.size:
        s = seg_index[rest]
        q = p[rest]
        d1 = np.sum((q - segs.end1[s]) ** 2, axis=1)
        d2 = np.sum((q - segs.end2[s]) ** 2, axis=1)
        out[rest] = 2.0 * np.arcsin(np.minimum(0.5 * np.sqrt(np.minimum(d1, d2)), 1.0))
    return out


#: Index cells for the margin search: 0.25 degree in Dec by 0.25 degree of RA, built from
#: 2-degree parent cells (Note 2 of _margin_index).
_INDEX_CELL_DEG = 0.5
_INDEX_PARENT_CELL_DEG = 2.0
#: Extra distance (rad) kept in candidate lists so the rounding check also sees the
#: segments within the table's rounding (2.7 arcsec) of a point, not only the nearest.
_INDEX_SLACK_RAD = 3.0 / ARCSEC_PER_RAD


@dataclasses.dataclass(frozen=True)
class _MarginIndex:
    cell_first: np.ndarray  # first entry of each coarse cell
    key_x: np.ndarray  # constellation of each entry (entries sorted by cell, then X)
    max_present: int  # most constellations present in one coarse cell
    flat: np.ndarray  # candidate segment indices, each entry's list in turn
    n_ra: int
    n_dec: int
    entry_word: np.ndarray  # each entry packed in one int64 (_pack_entries)
    cell_word: np.ndarray  # the packed first entry of each coarse cell


#: Bit layout of a packed margin-index entry (:func:`_pack_entries`): where its candidate
#: list starts in ``flat`` (bits 0-31), its first candidate segment (32-47), its number of
#: candidates (48-55) and its constellation (56-62).
_WORD_SEG_SHIFT, _WORD_COUNT_SHIFT, _WORD_KEY_SHIFT = 32, 48, 56


def _pack_entries(start, count, flat, key_x):
    """One int64 per margin-index entry holding what a point needs from it (the bits of
    _WORD_SEG_SHIFT and after), so that a point's entry is read with one random access into
    one table instead of five into five (measured: Note 2 of :func:`_margins_block`)."""
    if not (
        flat.size < 2**32 and int(np.max(flat)) < 2**16 and int(np.max(count)) < 2**8
        and int(np.max(key_x)) < 2**7 and int(np.min(key_x)) >= 0
    ):  # fmt: skip
        raise RuntimeError("margin index: an entry does not fit its packed word")
    return (
        start.astype(np.int64)
        | (flat[start].astype(np.int64) << _WORD_SEG_SHIFT)
        | (count.astype(np.int64) << _WORD_COUNT_SHIFT)
        | (key_x.astype(np.int64) << _WORD_KEY_SHIFT)
    )


def _presence(step):
    """(cell Dec index, cell RA index, constellation) for every constellation present in
    each cell of a ``step``-degree grid, sorted by cell then constellation.

    Notes
    -----
    1. The union of the index grid's lines and the table grid's lines cuts the sphere into
       pieces that each lie in one index cell and one constellation; each piece's centre
       gives both.
    """
    table = boundary_table()
    n_ra = int(round(360.0 / step))
    n_dec = int(round(180.0 / step))
    ra_e = np.unique(np.concatenate([table.ra_edges_h * 15.0, step * np.arange(n_ra + 1)]))
    dec_e = np.unique(np.concatenate([table.dec_edges_deg, step * np.arange(n_dec + 1) - 90.0]))
    ra_mid = 0.5 * (ra_e[1:] + ra_e[:-1])
    dec_mid = 0.5 * (dec_e[1:] + dec_e[:-1])
    rr, dd = np.meshgrid(ra_mid, dec_mid)
    x = _grid_lookup(rr.ravel(), dd.ravel()).astype(np.int64)
    ci = np.clip((rr.ravel() / step).astype(np.int64), 0, n_ra - 1)
    cj = np.clip(((dd.ravel() + 90.0) / step).astype(np.int64), 0, n_dec - 1)
    ncon = len(table.abbreviations)
    key = np.sort((cj * n_ra + ci) * ncon + x)
    key = key[np.concatenate([[True], key[1:] != key[:-1]])]
    cell = key // ncon
    return cell // n_ra, cell % n_ra, key % ncon, n_ra, n_dec


def _cell_geometry(cj, ci, step):
    dec0 = (cj * step - 90.0) * RAD_PER_DEG
    dec1 = dec0 + step * RAD_PER_DEG
    ra0 = ci * step * RAD_PER_DEG
    ra1 = ra0 + step * RAD_PER_DEG
    cra = 0.5 * (ra0 + ra1)
    cdec = 0.5 * (dec0 + dec1)
    radius = np.maximum.reduce(
        [_gc_distance(cra, cdec, a, d) for a in (ra0, ra1) for d in (dec0, dec1)]
    )
    return cra, cdec, radius * (1.0 + 1e-9) + 1e-12


def _filter_candidates(cj, ci, step, src_start, src_count, src_flat):
    """Keep, per entry, the source segments that can be nearest (Note 1 of _margin_index)."""
    cra, cdec, radius = _cell_geometry(cj, ci, step)
    entry = np.repeat(np.arange(cj.size), src_count)
    starts = np.cumsum(src_count) - src_count
    within = np.arange(entry.size) - np.repeat(starts, src_count)
    pair_seg = src_flat[np.repeat(src_start, src_count) + within]
    c = _unit_vectors_rows(cra, cdec)
    rho = np.cos(cdec)
    meas = _one_minus_cos_distance(c[0][entry], c[1][entry], c[2][entry], rho[entry], pair_seg)
    # distance from 1 - cos d (good to ~1e-8 rad, far inside the 3-arcsec slack)
    dist = 2.0 * np.arcsin(np.minimum(np.sqrt(0.5 * np.maximum(meas, 0.0)), 1.0))
    nearest = np.minimum.reduceat(dist, starts)
    keep = dist <= (nearest + 2.0 * radius)[entry] + _INDEX_SLACK_RAD
    flat = pair_seg[keep].astype(np.int32)
    count = np.bincount(entry[keep], minlength=cj.size)
    return np.cumsum(count) - count, count, flat


def _find_entries(cell_first, key_x, max_present, cell, x):
    pos = cell_first[cell].astype(np.int64)
    for _ in range(max_present - 1):  # step over the other constellations of the cell
        pos += key_x[pos] != x
    return pos


@functools.cache
def _margin_index() -> _MarginIndex:
    """Candidate boundary segments per (index cell, constellation), built in two levels.

    Notes
    -----
    1. For an index cell with centre c and angular radius r (the largest distance from c
       to a corner, which bounds the distance to every point of the cell), and a
       constellation X present in it, let D = min over the candidates of d(c, s). Any point p
       of the cell in X has its nearest boundary point on X's own boundary, at distance at
       most D + r; a segment can be that near to p only if d(c, s) <= D + 2r (triangle
       inequality). Those segments (plus _INDEX_SLACK_RAD for the rounding check) are
       kept.
    2. Level 1 (_INDEX_PARENT_CELL_DEG cells) starts from all of X's segments; level 2
       (_INDEX_CELL_DEG cells, which the queries use) starts from the level-1 list of the
       parent cell, which contains every segment that can be nearest anywhere in it.
    """
    table = boundary_table()
    segs = _segments()
    ncon = len(table.abbreviations)
    # segments of each constellation
    seg_ids = np.arange(segs.kind.size)
    owner = np.concatenate([segs.left, segs.right])
    owned = np.concatenate([seg_ids, seg_ids])
    order = np.argsort(owner, kind="stable")
    owner, owned = owner[order], owned[order]
    own_start = np.searchsorted(owner, np.arange(ncon), side="left")
    own_count = np.searchsorted(owner, np.arange(ncon), side="right") - own_start

    step1 = _INDEX_PARENT_CELL_DEG
    cj1, ci1, cx1, n_ra1, n_dec1 = _presence(step1)
    start1, count1, flat1 = _filter_candidates(
        cj1, ci1, step1, own_start[cx1], own_count[cx1], owned
    )
    cell1 = cj1 * n_ra1 + ci1
    first1 = np.searchsorted(cell1, np.arange(n_dec1 * n_ra1), side="left")
    keyx1 = np.concatenate([cx1, [-1]])
    max1 = int(np.max(np.bincount(cell1)))

    step = _INDEX_CELL_DEG
    ratio = int(round(step1 / step))
    cj, ci, cx, n_ra, n_dec = _presence(step)
    parent = _find_entries(first1, keyx1, max1, (cj // ratio) * n_ra1 + ci // ratio, cx)
    if not np.array_equal(keyx1[parent], cx):
        raise RuntimeError("margin index: a cell's constellation is missing from its parent")
    start, count, flat = _filter_candidates(cj, ci, step, start1[parent], count1[parent], flat1)
    cell_id = cj * n_ra + ci
    cell_first = np.searchsorted(cell_id, np.arange(n_dec * n_ra), side="left").astype(np.int32)
    max_present = int(np.max(np.bincount(cell_id)))
    key_x = np.concatenate([cx, [-1]]).astype(np.int16)  # sentinel after the last entry
    entry_word = _pack_entries(start, count, flat, key_x[:-1])
    cell_word = entry_word[cell_first]
    for a in (cell_first, key_x, flat, entry_word, cell_word):
        a.setflags(write=False)
    return _MarginIndex(cell_first, key_x, max_present, flat, n_ra, n_dec, entry_word, cell_word)


@functools.cache
def _segment_attributes() -> tuple:
    """Per-segment rows for the fast distance measure (see _one_minus_cos_distance).

    Rows: is constant-RA, cos c, sin c, cos lo, sin lo, cos hi, sin hi, where c is the
    arc's fixed coordinate (Dec, or RA) and lo, hi the ends of its running coordinate.
    """
    segs = _segments()
    if np.any(segs.hi - segs.lo >= math.pi):  # Notes 1-2 of _one_minus_cos_distance
        raise RuntimeError("a boundary arc spans 180 degrees or more")
    rows = (
        segs.kind == 1,
        segs.cos_c,
        segs.sin_c,
        np.cos(segs.lo),
        np.sin(segs.lo),
        np.cos(segs.hi),
        np.sin(segs.hi),
    )
    for r in rows:
        r.setflags(write=False)
    return rows


def _one_minus_cos_distance(x, y, z, rho, seg):
    """1 - cos(distance) from points to segments, pairwise (cheap).

    Parameters
    ----------
    x, y, z, rho : ndarray, shape (M,)
        Unit-vector components of the points and rho = cos(dec), B1875.0 frame.
    seg : ndarray of int, shape (M,)
        The segment paired with each point.

    Notes
    -----
    1. Constant-Dec arc (dec c, RA lo..hi, less than 12 h long): the point's RA is on the
       arc iff sin(ra - lo) >= 0 and sin(hi - ra) >= 0; then cos d = cos(dec - c) =
       rho cos c + z sin c; otherwise the nearer end: cos d = cos c (x cos e + y sin e)
       + z sin c.
    2. Constant-RA arc (RA c, Dec lo..hi): with q = x cos c + y sin c, sin d =
       |y cos c - x sin c| on the arc, i.e. iff lo <= atan2(z, q) <= hi, which for an arc
       shorter than 180 degrees is sin(phi - lo) >= 0 and sin(hi - phi) >= 0 (and implies
       q > 0); otherwise the nearer end: cos d = q cos e + z sin e.
    3. Monotonic in the distance, so it selects the nearest segment; its absolute rounding
       is about 1e-16 (distances good to about 1e-8 rad at worst), so small margins are
       recomputed with :func:`_segment_distance`.
    """
    is_v, cc, sc, cl, sl, ch, sh = (row.take(seg) for row in _segment_attributes())
    q = x * cc + y * sc
    w = y * cc - x * sc
    # constant Dec (is_v False): cc, sc are cos/sin of the Dec; lo/hi are RAs
    inside_h = (y * cl - x * sl >= 0.0) & (x * sh - y * ch >= 0.0)
    meas_h = 1.0 - (
        np.where(inside_h, rho, np.maximum(x * cl + y * sl, x * ch + y * sh)) * cc + z * sc
    )
    # constant RA (is_v True): cc, sc are cos/sin of the RA; lo/hi are Decs
    # (q > 0 is implied by the two tests for arcs shorter than 180 degrees)
    inside_v = (z * cl - q * sl >= 0.0) & (q * sh - z * ch >= 0.0)
    a2 = w * w
    meas_v = np.where(
        inside_v,
        a2 / (1.0 + np.sqrt(np.maximum(1.0 - a2, 0.0))),
        1.0 - np.maximum(q * cl + z * sl, q * ch + z * sh),
    )
    return np.where(is_v, meas_v, meas_h)


def _one_minus_cos_distance_split(x, y, z, rho, seg):
    """As :func:`_one_minus_cos_distance`, evaluating only each segment's own formula.

    ``seg`` should hold pointer-sized integers (Note 2 of :func:`_margins_block`). The
    gathers of the split cost less than the formula of the other kind, so this is the
    form the queries use; the unsplit one builds the index.
    """
    is_v_all, cc_all, sc_all, cl_all, sl_all, ch_all, sh_all = _segment_attributes()
    out = np.empty(seg.shape)
    kind_v = is_v_all.take(seg)
    h = np.flatnonzero(~kind_v)
    if h.size:
        s_, xh, yh = seg.take(h), x.take(h), y.take(h)
        cl, sl, ch, sh = cl_all.take(s_), sl_all.take(s_), ch_all.take(s_), sh_all.take(s_)
        inside = (yh * cl - xh * sl >= 0.0) & (xh * sh - yh * ch >= 0.0)
        radial = np.where(inside, rho.take(h), np.maximum(xh * cl + yh * sl, xh * ch + yh * sh))
        out[h] = 1.0 - (radial * cc_all.take(s_) + z.take(h) * sc_all.take(s_))
    v = np.flatnonzero(kind_v)
    if v.size:
        s_, xv, yv, zv = seg.take(v), x.take(v), y.take(v), z.take(v)
        cc, sc = cc_all.take(s_), sc_all.take(s_)
        cl, sl, ch, sh = cl_all.take(s_), sl_all.take(s_), ch_all.take(s_), sh_all.take(s_)
        q = xv * cc + yv * sc
        w = yv * cc - xv * sc
        # q > 0 is implied for arcs shorter than 180 degrees (Note 2 of the unsplit form)
        inside = (zv * cl - q * sl >= 0.0) & (q * sh - zv * ch >= 0.0)
        a2 = w * w
        out[v] = np.where(
            inside,
            a2 / (1.0 + np.sqrt(np.maximum(1.0 - a2, 0.0))),
            1.0 - np.maximum(q * cl + zv * sl, q * ch + zv * sh),
        )
    return out


#: Margins below this (rad, about 20 arcsec) are recomputed with the exact formulae.
_EXACT_BELOW_RAD = 1e-4


@functools.cache
def _index_z_lut():
    """Look-up table from z = sin(dec) to the Dec band of the margin index."""
    n_dec = int(round(180.0 / _INDEX_CELL_DEG))
    lines = np.sin((_INDEX_CELL_DEG * np.arange(n_dec + 1) - 90.0) * RAD_PER_DEG)
    lines[0], lines[-1] = -1.0, 1.0
    return _uniform_lut(lines)


#: Points per block in the margin computation: blocks of this size keep every temporary
#: array in the processor cache (measured 1.6x faster than whole-array passes at 10**6).
_MARGIN_BLOCK = 32_768


def _margins(xyz, ra_h, index):
    """Distance (arcsec) to the nearest boundary of each point's own constellation.

    Blocks of _MARGIN_BLOCK points go through :func:`_margins_block` (see there).
    """
    n = ra_h.size
    if n <= _MARGIN_BLOCK:
        return _margins_block(xyz, ra_h, index)
    margin = np.empty(n)
    other = np.empty(n, dtype=np.int16)
    ambiguous = np.empty(n, dtype=bool)
    for a in range(0, n, _MARGIN_BLOCK):
        sl = slice(a, a + _MARGIN_BLOCK)
        margin[sl], other[sl], ambiguous[sl] = _margins_block(xyz[:, sl], ra_h[sl], index[sl])
    return margin, other, ambiguous


def _margins_block(xyz, ra_h, index):
    """Distance (arcsec) to the nearest boundary of each point's own constellation.

    Parameters
    ----------
    xyz : ndarray, shape (3, N)
        Unit vectors (rows x, y, z) in the B1875.0 frame.
    ra_h : ndarray, shape (N,)
        Their right ascensions, hours in [0, 24].
    index : ndarray of int, shape (N,)
        Their constellations.

    Returns
    -------
    margin_arcsec, other_side_index, rounding_ambiguous : ndarray, shape (N,)

    Notes
    -----
    1. Candidate segments come from :func:`_margin_index`. The first candidate of every
       point is measured in one vector pass; points with more candidates are ordered by
       their number so that the k-th candidate of all points that have one is again one
       pass. The nearest is selected with :func:`_one_minus_cos_distance_split`; margins
       below _EXACT_BELOW_RAD are then recomputed exactly with :func:`_segment_distance`,
       and the table-rounding check is made there (a point more than 2.7 arcsec from its
       nearest boundary cannot be within the table's rounding of any).
    2. The table reads are random accesses into tables larger than the processor's
       nearest caches, so their number decides much of the cost: a point's index entry
       (its constellation, number of candidates, first candidate and where its list
       starts) is one packed int64 (:func:`_pack_entries`), read for most points straight
       from its cell (``cell_word``), and the reads of the index and of the segments'
       attributes are ``ndarray.take`` with pointer-sized indices (numpy's ``a[i]`` with
       int32 indices took 2.5x as long as ``a.take(i)`` with intp ones here). For
       1,000,000 random positions (``benchmarks.bench_constellations``, two runs of each
       code, alternating) this took the margins from 0.166 and 0.150 s to 0.105 and 0.103
       s, 3.2x and 3.1x the lookup's time to 2.05x and 2.07x, with the same answers bit
       for bit.
    """
    mi = _margin_index()
    segs = _segments()
    n = ra_h.size
    ci = np.minimum((ra_h * (15.0 / _INDEX_CELL_DEG)).astype(np.intp), mi.n_ra - 1)
    cj = _edge_index(xyz[2], _index_z_lut())
    cell = cj * mi.n_ra + ci
    word = mi.cell_word.take(cell)  # the cell's first entry
    other_x = np.flatnonzero((word >> _WORD_KEY_SHIFT) != index)
    if other_x.size:  # cells where several constellations meet: step to the right entry
        pos = _find_entries(
            mi.cell_first, mi.key_x, mi.max_present, cell.take(other_x), index.take(other_x)
        )
        word[other_x] = mi.entry_word.take(pos)
    if not np.array_equal(word >> _WORD_KEY_SHIFT, index):  # impossible for a consistent grid
        raise RuntimeError("margin index has no entry for a looked-up cell")
    counts = (word >> _WORD_COUNT_SHIFT) & 0xFF
    start_all = word & 0xFFFFFFFF
    x0, y0, z0 = xyz[0], xyz[1], xyz[2]
    # cos(dec) from x and y, not sqrt(1 - z^2): near a pole 1 - z^2 cancels and would put
    # up to 0.005 arcsec into the margin (about sqrt(eps) rad, within 1e-8 rad of a pole)
    rho0 = np.sqrt(x0 * x0 + y0 * y0)
    # first candidate of every point, in input order
    best_seg = (word >> _WORD_SEG_SHIFT) & 0xFFFF
    best = _one_minus_cos_distance_split(x0, y0, z0, rho0, best_seg)
    # further candidates: points ordered by their number of candidates (radix sort on 8
    # bits, most first) so that candidate k of all points that have one is a prefix
    multi = np.flatnonzero(counts > 1)
    if multi.size:
        sub_order = np.argsort(
            (255 - np.minimum(counts[multi], 255)).astype(np.uint8), kind="stable"
        )
        pts = multi[sub_order]
        cnt = counts[pts]
        st = start_all[pts]
        x, y, z, rho = x0[pts], y0[pts], z0[pts], rho0[pts]
        b_sub, s_sub = best[pts], best_seg[pts]
        n_with = np.searchsorted(-cnt, -np.arange(2, int(cnt[0]) + 1), side="right")
        for k, m in enumerate(n_with, start=1):
            seg = mi.flat.take(st[:m] + k).astype(np.intp)
            meas = _one_minus_cos_distance_split(x[:m], y[:m], z[:m], rho[:m], seg)
            better = meas < b_sub[:m]
            b_sub[:m] = np.where(better, meas, b_sub[:m])
            s_sub[:m] = np.where(better, seg, s_sub[:m])
        best[pts] = b_sub
        best_seg[pts] = s_sub
    x, y, z, rho = x0, y0, z0, rho0
    counts_sorted, start = counts, start_all

    # 1 - cos d = b  =>  d = 2 asin(sqrt(b / 2))
    margin = 2.0 * np.arcsin(np.minimum(np.sqrt(0.5 * np.maximum(best, 0.0)), 1.0))
    small = np.flatnonzero(margin < _EXACT_BELOW_RAD)
    ambiguous = np.zeros(n, dtype=bool)
    if small.size:
        p_small = np.column_stack([x[small], y[small], z[small]])
        ra_small = np.arctan2(y[small], x[small])
        dec_small = np.arcsin(np.clip(z[small], -1.0, 1.0))
        margin[small] = _segment_distance(p_small, ra_small, dec_small, best_seg[small], segs)
        # table rounding: any candidate (not only the nearest) within its tolerance
        close = small[margin[small] * ARCSEC_PER_RAD <= TABLE_RA_HALF_UNIT_ARCSEC_AT_EQUATOR]
        if close.size:
            cnt = counts_sorted[close]
            owner = np.repeat(np.arange(close.size), cnt)
            offs = np.arange(owner.size) - np.repeat(np.cumsum(cnt) - cnt, cnt)
            seg = mi.flat[np.repeat(start[close], cnt) + offs]
            pts = close[owner]
            dist = _segment_distance(
                np.column_stack([x[pts], y[pts], z[pts]]),
                np.arctan2(y[pts], x[pts]),
                np.arcsin(np.clip(z[pts], -1.0, 1.0)),
                seg,
                segs,
            )
            tol = np.where(
                segs.kind[seg] == 0,
                TABLE_DEC_HALF_UNIT_ARCSEC,
                TABLE_RA_HALF_UNIT_ARCSEC_AT_EQUATOR * rho[pts],
            )
            ambiguous[pts[dist * ARCSEC_PER_RAD <= tol]] = True
    # the constellation across: of the segment's two sides, the one that is not the point's
    other = (_segment_side_sum().take(best_seg) - index).astype(np.int16)
    return margin * ARCSEC_PER_RAD, other, ambiguous


@functools.cache
def _segment_side_sum() -> np.ndarray:
    segs = _segments()
    total = segs.left.astype(np.int32) + segs.right.astype(np.int32)
    total.setflags(write=False)
    return total


# ---------------------------------------------------------------------------------------
# Lookup
# ---------------------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True)
class ConstellationLookup:
    """Result of :func:`locate` (arrays shaped like the broadcast inputs).

    Attributes
    ----------
    index : ndarray of int16
        Constellation index (into ``boundary_table().abbreviations``) by the requested
        reduction.
    index_fk4, index_fk5 : ndarray of int16
        The answers of the FK4 and FK5 reductions.
    margin_arcsec : ndarray or None
        Distance to the nearest boundary arc, arcsec (None if not requested).
    other_side_index : ndarray of int16 or None
        Constellation across that nearest arc.
    flags : ndarray of uint16
        :class:`ConstellationFlag` bits.
    b1875_components : tuple of 3 ndarray
        Unit-vector components at equinox B1875.0 by the requested reduction;
        ``b1875_xyz`` stacks them, ``ra_b1875_deg`` and ``dec_b1875_deg`` give degrees.
    """

    index: np.ndarray
    index_fk4: np.ndarray
    index_fk5: np.ndarray
    margin_arcsec: np.ndarray | None
    other_side_index: np.ndarray | None
    flags: np.ndarray
    b1875_components: tuple

    @functools.cached_property
    def b1875_xyz(self) -> np.ndarray:
        """Unit vector at equinox B1875.0 by the requested reduction, shape (..., 3)."""
        return np.stack(self.b1875_components, axis=-1)

    @functools.cached_property
    def _b1875_angles(self) -> tuple:
        return _angles_deg(self.b1875_xyz)

    @property
    def ra_b1875_deg(self) -> np.ndarray:
        """Right ascension at equinox B1875.0, degrees in [0, 360)."""
        return self._b1875_angles[0]

    @property
    def dec_b1875_deg(self) -> np.ndarray:
        """Declination at equinox B1875.0, degrees."""
        return self._b1875_angles[1]

    @property
    def abbreviation(self) -> np.ndarray:
        """IAU abbreviations (array of str)."""
        return np.asarray(boundary_table().abbreviations)[self.index]

    @property
    def name(self) -> np.ndarray:
        """IAU names (array of str)."""
        return np.asarray(boundary_table().names)[self.index]


@overflow_to_infinity  # edge inputs overflow to inf / NaN, flagged (core.floating)
def locate(
    ra_deg,
    dec_deg,
    *,
    reduction: str = "fk4",
    with_margin: bool = True,
    near_boundary_arcsec=DEFAULT_NEAR_BOUNDARY_ARCSEC,
    extra_flags=0,
) -> ConstellationLookup:
    """Constellation of ICRS positions (vectorised).

    Parameters
    ----------
    ra_deg, dec_deg : array_like
        ICRS right ascension and declination of the positions at the epoch of interest,
        degrees (Note 2). Broadcast together.
    reduction : {"fk4", "fk5"}
        Reduction to equinox B1875.0 whose answer is returned in ``index`` (Note 3).
    with_margin : bool
        Also compute the distance to the nearest boundary and the constellation across it.
    near_boundary_arcsec : float or array_like
        Distance (arcsec) within which NEAR_BOUNDARY is set (Note 4). Broadcasts.
    extra_flags : int or array_like of int
        Flags to OR into the result (e.g. from a propagation step).

    Returns
    -------
    ConstellationLookup

    Notes
    -----
    1. The answer is exactly Roman's (1987) procedure on the published table: the table is
       turned into a grid whose cells each lie in one constellation (see
       :func:`boundary_table`); most positions are answered from a coarse table of cells
       lying well inside one constellation (:func:`_quick_lut`), the rest by locating the
       grid cell with two uniform-bin searches.
    2. Positions are directions in ICRS at the epoch wanted; space motion is applied
       beforehand (:func:`locate_moving`). The boundaries are fixed on the sky: the
       reduction does not depend on the epoch.
    3. Both reductions are always computed; REDUCTIONS_DISAGREE marks positions where they
       give different constellations (all lie within about 0.5 arcsec of a boundary).
    4. The table rounds its RA (hours) and Dec (degrees) to 1e-4, so a position within
       0.18 arcsec (Dec boundaries) or 2.7 arcsec * cos(dec) (RA boundaries) of a boundary
       is undecidable from the table: TABLE_ROUNDING_AMBIGUOUS and NEAR_BOUNDARY are set
       there whatever ``near_boundary_arcsec`` is. Margins are computed on the sphere
       (constant-Dec arcs are small circles, constant-RA arcs meridian arcs).

    References
    ----------
    Roman (1987), PASP 99, 695 and CDS VI/42 ReadMe; Delporte (1930).
    """
    if reduction not in REDUCTIONS:
        raise ValueError(f"reduction must be one of {REDUCTIONS}, not {reduction!r}")
    ra_b, dec_b, near_b, extra_b = np.broadcast_arrays(
        np.asarray(ra_deg, dtype=float),
        np.asarray(dec_deg, dtype=float),
        np.asarray(near_boundary_arcsec, dtype=float),
        np.asarray(extra_flags, dtype=np.int64),
    )
    shape = ra_b.shape
    for name, arr in (("ra_deg", ra_b), ("dec_deg", dec_b)):
        if not np.all(np.isfinite(arr)):
            raise ValueError(f"{name}: must be finite")
    ra_r = ra_b.ravel() * RAD_PER_DEG
    dec_r = dec_b.ravel() * RAD_PER_DEG
    near_r, extra_r = near_b.ravel(), extra_b.ravel()
    blocks = [
        _locate_core(
            _unit_vectors_rows(ra_r[a : a + _BLOCK], dec_r[a : a + _BLOCK]),
            reduction,
            with_margin,
            near_r[a : a + _BLOCK],
            extra_r[a : a + _BLOCK],
            True,
        )
        for a in range(0, max(ra_r.size, 1), _BLOCK)
    ]
    return _assemble(blocks, shape)


#: Positions per block: blocks of this size keep the temporary arrays in the processor
#: cache, which is faster than whole-array passes for large batches.
_BLOCK = 65_536


def _assemble(blocks, shape):
    """One ConstellationLookup from the per-block dicts of :func:`_locate_core`."""

    def cat(key, dtype=None):
        parts = [blk[key] for blk in blocks]
        if parts[0] is None:
            return None
        out = parts[0] if len(parts) == 1 else np.concatenate(parts, axis=-1)
        return out.reshape(shape) if dtype is None else out.astype(dtype).reshape(shape)

    b = [blk["b"] for blk in blocks]
    b = b[0] if len(b) == 1 else np.concatenate(b, axis=1)
    return ConstellationLookup(
        index=cat("index"),
        index_fk4=cat("idx4"),
        index_fk5=cat("idx5"),
        margin_arcsec=cat("margin"),
        other_side_index=cat("other"),
        flags=cat("flags", np.uint16),
        b1875_components=tuple(c.reshape(shape) for c in b),
    )


def _cos_sin(angle_rad):
    """cos and sin from one tangent of the half angle (t = tan(a/2)).

    cos a = (1 - t^2) / (1 + t^2), sin a = 2 t / (1 + t^2); absolute errors of a few 1e-16,
    and several times faster than two separate calls on large arrays.
    """
    t = np.tan(0.5 * angle_rad)
    t2 = t * t
    r = 1.0 / (1.0 + t2)
    return (1.0 - t2) * r, 2.0 * t * r


def _unit_vectors_rows(ra_rad, dec_rad):
    """Unit vectors as rows (3, N) from RA and Dec in radians (1-D)."""
    out = np.empty((3, ra_rad.size))
    ca, sa = _cos_sin(ra_rad)
    cd, sd = _cos_sin(dec_rad)
    np.multiply(cd, ca, out=out[0])
    np.multiply(cd, sa, out=out[1])
    out[2] = sd
    return out


#: Largest separation between the FK4 and FK5 reductions at B1875.0 allowed for when
#: deciding which positions need both (measured 0.52 arcsec; 2 arcsec kept), radians.
_REDUCTION_SEPARATION_BOUND_RAD = 2.0 / ARCSEC_PER_RAD


def _rotate_components(xyz, reduction):
    """B1875.0 unit vectors, rows (3, N), of ICRS unit vectors given as rows (3, N)."""
    out = _reduction_rotation(reduction) @ xyz
    if reduction == "fk4":
        out += _b1875_e_terms()[:, None]
        out *= 1.0 / np.sqrt(out[0] * out[0] + out[1] * out[1] + out[2] * out[2])
    return out


def _lookup_components(xyz_b1875):
    """Grid lookup of B1875.0 unit vectors (rows); also RA (hours) and the band indices."""
    x, y, z = xyz_b1875
    table = boundary_table()
    ra_lut, z_lut = _grid_tables()
    ra_h = np.arctan2(y, x) * (12.0 / math.pi)
    ra_h += np.where(ra_h < 0.0, 24.0, 0.0)
    i = _edge_index(ra_h, ra_lut)
    j = _edge_index(z, z_lut)
    return _flat_cells()[j * (table.ra_edges_h.size - 1) + i], ra_h, i, j


@functools.cache
def _flat_cells():
    cells = np.ascontiguousarray(boundary_table().cell_index.ravel())
    cells.setflags(write=False)
    return cells


@dataclasses.dataclass(frozen=True)
class _QuickLut:
    value: np.ndarray  # constellation of each quick cell, or -1 (flat, z band major)
    n_ra: int
    n_z: int
    ra_bins_per_hour: float
    z_bins_per_unit: float


#: Quick look-up cells: 0.25 degree of RA by 1/1024 in z = sin(dec) (equal area).
_QUICK_RA_BINS = 1440
_QUICK_Z_BINS = 2048


@functools.cache
def _quick_lut() -> _QuickLut:
    """A coarse (RA, sin dec) table answering most positions with one memory read.

    Notes
    -----
    1. A quick cell gets a constellation only if it and its eight neighbours each lie
       inside that one constellation (found on the union of the quick grid and the table
       grid, as in :func:`_presence`); otherwise -1, and the position takes the exact path.
       Since every quick cell is wider than _REDUCTION_SEPARATION_BOUND_RAD except within
       0.2 degree of the poles (excluded: those cells are -1), a position in a valued cell
       is farther than that from every boundary, so all reductions agree there.
    """
    table = boundary_table()
    n_ra, n_z = _QUICK_RA_BINS, _QUICK_Z_BINS
    ra_lines = 24.0 * np.arange(n_ra + 1) / n_ra
    z_lines = np.clip(-1.0 + 2.0 * np.arange(n_z + 1) / n_z, -1.0, 1.0)
    dec_lines = np.degrees(np.arcsin(z_lines))
    ra_e = np.unique(np.concatenate([table.ra_edges_h, ra_lines]))
    dec_e = np.unique(np.concatenate([table.dec_edges_deg, dec_lines]))
    ra_mid = 0.5 * (ra_e[1:] + ra_e[:-1])
    dec_mid = 0.5 * (dec_e[1:] + dec_e[:-1])
    x = _grid_lookup(ra_mid[None, :] * 15.0, dec_mid[:, None]).astype(np.int16)
    qi = np.minimum((ra_mid * (n_ra / 24.0)).astype(np.intp), n_ra - 1)
    qj = np.minimum(((np.sin(np.radians(dec_mid)) + 1.0) * (n_z / 2.0)).astype(np.intp), n_z - 1)
    lo = np.full((n_z, n_ra), np.iinfo(np.int16).max, dtype=np.int16)
    hi = np.full((n_z, n_ra), -1, dtype=np.int16)
    jj = np.broadcast_to(qj[:, None], x.shape)
    ii = np.broadcast_to(qi[None, :], x.shape)
    np.minimum.at(lo, (jj.ravel(), ii.ravel()), x.ravel())
    np.maximum.at(hi, (jj.ravel(), ii.ravel()), x.ravel())
    value = np.where(lo == hi, lo, -1).astype(np.int16)
    ok = value >= 0
    for dj in (-1, 0, 1):
        for di in (-1, 0, 1):
            if dj == 0 and di == 0:
                continue
            shifted = np.roll(np.roll(value, di, axis=1), dj, axis=0)
            ok &= shifted == value
    # rows next to the poles: no neighbours across the pole, and cells narrower than the
    # bound near it
    pole_rows = np.abs(dec_lines[:-1] + dec_lines[1:]) / 2.0 > 89.8
    ok[0, :] = ok[-1, :] = False
    ok[pole_rows, :] = False
    value = np.where(ok, value, -1).astype(np.int16).ravel()
    value.setflags(write=False)
    return _QuickLut(value, n_ra, n_z, n_ra / 24.0, n_z / 2.0)


def _near_grid_line(xyz_b1875, ra_h, i, j, bound_rad):
    """True where a position is within ``bound_rad`` of a line of the cell grid."""
    table = boundary_table()
    z = xyz_b1875[2]
    e = table.ra_edges_h
    d_ra = np.minimum(ra_h - e[i], e[i + 1] - ra_h) * (math.pi / 12.0)
    zs = _grid_tables()[1][3]  # sin of the Dec edges (padded)
    d_z = np.minimum(z - zs[j], zs[j + 1] - z)
    # angular distance to an hour circle ~ dRA cos(dec); compare squares (cos^2 = 1 - z^2)
    return (d_ra * d_ra * (1.0 - z * z) < bound_rad * bound_rad) | (d_z < bound_rad)


def _locate_vectors(vec, shape, reduction, with_margin, near_arcsec, extra_flags, compare=True):
    """:func:`locate` on ICRS unit vectors of shape (N, 3); results reshaped to ``shape``."""
    xyz = np.ascontiguousarray(np.asarray(vec, dtype=float).T)
    return _locate_components(xyz, shape, reduction, with_margin, near_arcsec, extra_flags, compare)


def _locate_components(xyz, shape, reduction, with_margin, near_arcsec, extra_flags, compare=True):
    """:func:`locate` on ICRS unit vectors given as rows, shape (3, N) (see _locate_core)."""
    near_arcsec = np.broadcast_to(np.asarray(near_arcsec, dtype=float), xyz.shape[1:])
    extra_flags = np.broadcast_to(np.asarray(extra_flags, dtype=np.int64), xyz.shape[1:])
    blocks = [
        _locate_core(
            xyz[:, a : a + _BLOCK],
            reduction,
            with_margin,
            near_arcsec[a : a + _BLOCK],
            extra_flags[a : a + _BLOCK],
            compare,
        )
        for a in range(0, max(xyz.shape[1], 1), _BLOCK)
    ]
    return _assemble(blocks, shape)


def _locate_core(xyz, reduction, with_margin, near_arcsec, extra_flags, compare):
    """:func:`locate` on ICRS unit vectors given as rows, shape (3, N); flat results.

    Notes
    -----
    1. The requested reduction is computed for every position, and most positions are
       answered from :func:`_quick_lut`, a coarse table whose cells (with their neighbours)
       lie inside one constellation. The FK4 and FK5 reductions differ by less than 0.6
       arcsec, so they can give different answers only within that distance of a line of
       the cell grid; the other reductions are computed only for positions within
       _REDUCTION_SEPARATION_BOUND_RAD of a grid line (all outside the quick cells).
    2. With ``compare`` False only the requested reduction is computed (``index_fk4`` and
       ``index_fk5`` then repeat ``index``, and REDUCTIONS_DISAGREE is never set).
    """
    b = _rotate_components(xyz, reduction)
    x, y, z = b
    # RA in hours, [0, 24]; y + 0.0 turns -0.0 into +0.0 so that RA 0 never reads as 24
    ra_h = np.arctan2(-(y + 0.0), -x) * (12.0 / math.pi) + 12.0
    quick = _quick_lut()
    qi = np.minimum((ra_h * quick.ra_bins_per_hour).astype(np.intp), quick.n_ra - 1)
    qj = np.minimum(((z + 1.0) * quick.z_bins_per_unit).astype(np.intp), quick.n_z - 1)
    index = quick.value[qj * quick.n_ra + qi]
    slow = np.flatnonzero(index < 0)
    idx4 = index
    idx5 = index
    if slow.size:
        bs = b[:, slow]
        i = _edge_index(ra_h[slow], _grid_tables()[0])
        j = _edge_index(bs[2], _grid_tables()[1])
        index[slow] = _flat_cells()[j * (boundary_table().ra_edges_h.size - 1) + i]
        if compare:
            near = _near_grid_line(bs, ra_h[slow], i, j, _REDUCTION_SEPARATION_BOUND_RAD)
            near_line = slow[near]
            sub = xyz[:, near_line]
            for red in ("fk4", "fk5"):
                if red == reduction:
                    continue
                other_idx = _lookup_components(_rotate_components(sub, red))[0]
                full = index.copy()
                full[near_line] = other_idx
                if red == "fk4":
                    idx4 = full
                else:
                    idx5 = full
    flags = np.asarray(extra_flags, dtype=np.int64)
    if compare:
        flags = flags | np.where(idx4 != idx5, int(ConstellationFlag.REDUCTIONS_DISAGREE), 0)
    margin = other = None
    if with_margin:
        margin, other, ambiguous = _margins(b, ra_h, index)
        near = (margin <= near_arcsec) | ambiguous
        flags = flags | np.where(near, int(ConstellationFlag.NEAR_BOUNDARY), 0)
        flags = flags | np.where(ambiguous, int(ConstellationFlag.TABLE_ROUNDING_AMBIGUOUS), 0)
    return {
        "index": index,
        "idx4": idx4,
        "idx5": idx5,
        "margin": margin,
        "other": other,
        "flags": flags,
        "b": b,
    }


# ---------------------------------------------------------------------------------------
# Space motion (straight-line model)
# ---------------------------------------------------------------------------------------

#: km/s expressed in pc per Julian year: 1 / (A * 648000/pi), A = au/Julian year in km/s.
_PC_PER_YR_PER_KM_S = 1.0 / (AU_PER_JULIAN_YEAR_KM_S * PC_AU)


def _space_motion(
    ra_deg, dec_deg, parallax_mas, pm_ra_cosdec_mas_yr, pm_dec_mas_yr, radial_velocity_km_s
):
    """Position and velocity vectors of the straight-line model, and flags (1-D inputs).

    Returns ``r0`` (N, 3) and ``v`` (N, 3) per Julian year such that the direction at
    time dt (years after the reference epoch) is (r0 + v dt) / |r0 + v dt|.

    Notes
    -----
    1. With a positive parallax the model is d r0 + (d (mu_a p + mu_d q) + v_r r) t
       (Hipparcos Vol. 1, section 1.5.5, eqs. 1.5.60-1.5.63 in vector form), d in pc and
       v_r in pc/yr. Only directions are used, so both vectors are divided by d: r0 = r
       (unit) and v = mu_a p + mu_d q + (v_r / d) r (rad/yr). That is exact, and stays
       finite for any parallax (1000 / parallax overflows for parallaxes near 1e-308 mas).
    2. Without a usable parallax the distance drops out only if the radial velocity is
       ignored: r0 = r (unit), v = mu_a p + mu_d q (rad/yr); PARALLAX_MISSING is set where
       the parallax is not known, PARALLAX_NOT_POSITIVE (alone) where it is zero or
       negative.
    3. A missing radial velocity is taken as zero and flagged. A star with either proper
       motion component missing is held fixed (both components taken as zero) and flagged
       PROPER_MOTION_MISSING: one component alone would move it along a direction nobody
       gave. (The API refuses such stars instead; this is for batch runs on files.)
    4. A position within AT_POLE_RAD of a pole (cos(dec) below it) with a proper motion
       given is flagged AT_POLE: p and q there are the east and north of the RA given (the
       limit along that meridian), a convention that sets the direction of the motion. Two
       RAs 90 deg apart with the same components move the star in directions 90 deg apart.
    """
    ra, dec, plx, pma, pmd, rv = (
        a.ravel()
        for a in np.broadcast_arrays(
            *(
                np.atleast_1d(np.asarray(a, dtype=float))
                for a in (
                    ra_deg,
                    dec_deg,
                    parallax_mas,
                    pm_ra_cosdec_mas_yr,
                    pm_dec_mas_yr,
                    radial_velocity_km_s,
                )
            )
        )
    )
    ra = ra * RAD_PER_DEG
    dec = dec * RAD_PER_DEG
    flags = np.zeros(ra.shape, dtype=np.int64)
    pm_missing = ~np.isfinite(pma) | ~np.isfinite(pmd)
    flags |= np.where(pm_missing, int(ConstellationFlag.PROPER_MOTION_MISSING), 0)
    pma = np.where(pm_missing, 0.0, pma) / MAS_PER_RAD
    pmd = np.where(pm_missing, 0.0, pmd) / MAS_PER_RAD
    plx_ok = np.isfinite(plx) & (plx > 0.0)
    flags |= np.where(np.isfinite(plx), 0, int(ConstellationFlag.PARALLAX_MISSING))
    flags |= np.where(
        np.isfinite(plx) & (plx <= 0.0), int(ConstellationFlag.PARALLAX_NOT_POSITIVE), 0
    )
    rv_ok = np.isfinite(rv)
    flags |= np.where(rv_ok, 0, int(ConstellationFlag.RADIAL_VELOCITY_MISSING))
    sa, ca, sd, cd = np.sin(ra), np.cos(ra), np.sin(dec), np.cos(dec)
    # Note 4: at a pole the direction of the motion is that of the RA given.
    flags |= np.where((cd < AT_POLE_RAD) & ~pm_missing, int(ConstellationFlag.AT_POLE), 0)
    r = np.stack([cd * ca, cd * sa, sd], axis=-1)
    p = np.stack([-sa, ca, np.zeros_like(ra)], axis=-1)
    q = np.stack([-sd * ca, -sd * sa, cd], axis=-1)
    # v_r / d in 1/yr, with 1 / d = parallax / 1000 (Note 1).
    vr_over_d = np.where(plx_ok & rv_ok, rv * plx * 1e-3, 0.0) * _PC_PER_YR_PER_KM_S
    r0 = r
    v = pma[:, None] * p + pmd[:, None] * q + vr_over_d[:, None] * r
    return r0, v, flags


def _direction_at(r0, v, dt_yr):
    w = r0 + v * np.asarray(dt_yr, dtype=float)[..., None]
    return w / np.linalg.norm(w, axis=-1, keepdims=True)


@overflow_to_infinity  # edge inputs overflow to inf / NaN, flagged (core.floating)
def locate_moving(
    ra_deg,
    dec_deg,
    parallax_mas,
    pm_ra_cosdec_mas_yr,
    pm_dec_mas_yr,
    radial_velocity_km_s,
    epoch_from_jyear,
    epoch_to_jyear,
    *,
    reduction: str = "fk4",
    with_margin: bool = True,
    near_boundary_arcsec=DEFAULT_NEAR_BOUNDARY_ARCSEC,
) -> ConstellationLookup:
    """Constellation of stars propagated from one epoch to another (vectorised).

    Parameters
    ----------
    ra_deg, dec_deg : array_like
        ICRS position at ``epoch_from_jyear``, degrees.
    parallax_mas : array_like
        Parallax, mas; NaN, zero or negative means unknown (Note 1).
    pm_ra_cosdec_mas_yr, pm_dec_mas_yr : array_like
        Proper motion, mas/yr (the RA component includes cos(dec)).
    radial_velocity_km_s : array_like
        Radial velocity, km/s; NaN means unknown.
    epoch_from_jyear, epoch_to_jyear : array_like
        Julian epochs (TDB) of the catalogue position and of the lookup.
    reduction, with_margin, near_boundary_arcsec
        As for :func:`locate`.

    Returns
    -------
    ConstellationLookup
        With the propagation flags (Note 1) included.

    Notes
    -----
    1. Straight-line space motion (Hipparcos Vol. 1, section 1.5.5) by
       :func:`service.core.propagation.propagate_standard`; the flags follow
       :func:`_space_motion` (same model, used by the crossing search).
    """
    arrays = np.broadcast_arrays(
        *(
            np.asarray(a, dtype=float)
            for a in (
                ra_deg,
                dec_deg,
                parallax_mas,
                pm_ra_cosdec_mas_yr,
                pm_dec_mas_yr,
                radial_velocity_km_s,
                epoch_from_jyear,
                epoch_to_jyear,
                near_boundary_arcsec,
            )
        )
    )
    shape = arrays[0].shape
    flat = [a.ravel() for a in arrays]
    _r0, _v, flags = _space_motion(*flat[:6])
    fixed = ~np.isfinite(flat[3]) | ~np.isfinite(flat[4])  # held fixed (_space_motion)
    pma, pmd = (np.where(fixed, 0.0, a) for a in flat[3:5])
    moved, _flags = propagate_standard(
        flat[0], flat[1], flat[2], pma, pmd, flat[5], flat[6], flat[7]
    )
    vec = _unit_vectors_rows(moved.ra_deg * RAD_PER_DEG, moved.dec_deg * RAD_PER_DEG)
    return _locate_components(vec, shape, reduction, with_margin, flat[8], flags)


# ---------------------------------------------------------------------------------------
# Crossings
# ---------------------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True)
class BoundaryCrossings:
    """Result of :func:`boundary_crossings`.

    Per crossing (sorted by star, then epoch): ``star`` (index into the input),
    ``epoch_jyear`` (Julian epoch, TDB), ``from_index`` and ``to_index`` (constellation
    indices). Per star: ``start_index`` and ``end_index`` (constellation at the window's
    ends), ``count`` (number of crossings) and ``flags`` (:class:`ConstellationFlag`).
    """

    star: np.ndarray
    epoch_jyear: np.ndarray
    from_index: np.ndarray
    to_index: np.ndarray
    start_index: np.ndarray
    end_index: np.ndarray
    count: np.ndarray
    flags: np.ndarray


def check_crossing_window(epoch_jyear, start_jyear, end_jyear, max_step_yr):
    """Validate a crossing search window; return the step (years) to use.

    Raises ValueError naming the offending argument: non-finite values, an inverted or
    empty window, an end more than MAX_CROSSING_WINDOW_YR from the reference epoch, a step
    below MIN_CROSSING_STEP_YR, or more than 10**6 steps.
    """
    for name, value in (
        ("epoch_jyear", epoch_jyear),
        ("start_jyear", start_jyear),
        ("end_jyear", end_jyear),
    ):
        if not np.all(np.isfinite(value)):
            raise ValueError(f"{name}: must be finite")
    if not np.all(np.asarray(end_jyear) > np.asarray(start_jyear)):
        raise ValueError("end_jyear: must be later than start_jyear")
    for name, value in (("start_jyear", start_jyear), ("end_jyear", end_jyear)):
        if np.any(np.abs(np.asarray(value) - np.asarray(epoch_jyear)) > MAX_CROSSING_WINDOW_YR):
            raise ValueError(
                f"{name}: must be within {MAX_CROSSING_WINDOW_YR:g} years of the reference epoch"
            )
    span = float(np.max(np.asarray(end_jyear) - np.asarray(start_jyear)))
    if max_step_yr is None:
        return span / 100.0
    step = float(max_step_yr)
    if not math.isfinite(step) or step < MIN_CROSSING_STEP_YR:
        raise ValueError(f"max_step_yr: must be at least {MIN_CROSSING_STEP_YR:.6g} years (1 day)")
    if span / step > 1e6:
        raise ValueError("max_step_yr: too small for the window (more than 10**6 steps)")
    return step


def _angular_speed_bound(r0, v, t_from, t_to):
    """Upper bound (rad/yr) of the angular speed of r0 + v t over [t_from, t_to].

    Notes
    -----
    1. The direction of w(t) = r0 + v t turns at |w x w'| / |w|^2 = |r0 x v| / |w|^2
       (exactly); the minimum of |w| over the interval is at the closest approach
       t* = -(r0.v)/|v|^2, clamped to the interval. (The looser |v| / |w| counts the
       radial part of v too, and grows like 1 / (t* - t) long before a star that
       approaches the Sun turns at all.)
    """
    vv = np.einsum("ij,ij->i", v, v)
    with np.errstate(invalid="ignore", divide="ignore"):
        t_star = np.where(vv > 0.0, -np.einsum("ij,ij->i", r0, v) / vv, t_from)
    t_star = np.clip(t_star, t_from, t_to)
    w = r0 + v * t_star[:, None]
    ww = np.einsum("ij,ij->i", w, w)
    turn = np.linalg.norm(np.cross(r0, v), axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(vv > 0.0, turn / ww, 0.0)


@overflow_to_infinity  # edge inputs overflow to inf / NaN, flagged (core.floating)
def boundary_crossings(
    ra_deg,
    dec_deg,
    parallax_mas,
    pm_ra_cosdec_mas_yr,
    pm_dec_mas_yr,
    radial_velocity_km_s,
    epoch_jyear,
    start_jyear,
    end_jyear,
    *,
    max_step_yr=None,
    reduction: str = "fk4",
    max_iterations: int = 20_000,
) -> BoundaryCrossings:
    """Every boundary crossing of stars in straight-line motion within a time window.

    Parameters
    ----------
    ra_deg, dec_deg, parallax_mas, pm_ra_cosdec_mas_yr, pm_dec_mas_yr,
    radial_velocity_km_s : array_like, shape (N,) or scalar
        Astrometry at ``epoch_jyear`` (units as in :func:`locate_moving`).
    epoch_jyear : float
        Julian epoch (TDB) of the astrometry.
    start_jyear, end_jyear : float
        The window, Julian epochs; each end within MAX_CROSSING_WINDOW_YR (100,000 yr) of
        ``epoch_jyear`` (Note 5).
    max_step_yr : float, optional
        Largest step of the search, Julian years (default: window / 100; at least one day,
        at most 10**6 steps per window).
    reduction : {"fk4", "fk5", "fk5_iau1976"}
        Reduction to B1875.0 (see :func:`icrs_to_b1875`).
    max_iterations : int
        Safety limit on search steps; stars not finished get SEARCH_INCOMPLETE.

    Returns
    -------
    BoundaryCrossings

    Notes
    -----
    1. Search by safe steps: at time t the star lies at distance m (the margin of
       :func:`locate`) inside its constellation; over the next interval its direction in
       the B1875.0 frame turns at most at omega (:func:`_angular_speed_bound`, enlarged by
       FK4_DISTORTION_ALLOWANCE for the E-terms), so a step of m / omega cannot reach any
       boundary. No sliver of a constellation, however thin, can be stepped over. The bound
       is taken over trial intervals of the largest step, a tenth of it, and so on, and
       the longest safe step kept: a star that passes close to the Sun later in the
       interval (its direction then sweeps fast) does not hold the steps before the
       passage to the speed of the passage.
    2. When a star is closer to a boundary than it moves in CROSSING_MIN_STEP_YR (1e-3
       day), the search steps by that amount and checks the constellation after the step.
    3. Every change of constellation between two steps is located by bisection to
       CROSSING_EPOCH_TOLERANCE_YR (1e-4 day); the epoch reported is the bracket's middle.
    4. Two crossings closer together in time than CROSSING_MIN_STEP_YR (a corner grazed
       within 1e-3 day) can be reported as one crossing (or none, if the star returns).
    5. Over 100,000 years the straight-line model is itself only a model: Galactic
       orbits curve. The answer is that of the model.
    6. A star that runs out of steps (SEARCH_INCOMPLETE) still gets its constellation at
       the end of the window in ``end_index`` (one lookup there); its crossings after the
       last one listed are missing.
    """
    if reduction not in REDUCTIONS:
        raise ValueError(f"reduction must be one of {REDUCTIONS}, not {reduction!r}")
    step = check_crossing_window(epoch_jyear, start_jyear, end_jyear, max_step_yr)
    arrays = np.broadcast_arrays(
        *(
            np.atleast_1d(np.asarray(a, dtype=float))
            for a in (
                ra_deg,
                dec_deg,
                parallax_mas,
                pm_ra_cosdec_mas_yr,
                pm_dec_mas_yr,
                radial_velocity_km_s,
            )
        )
    )
    flat = [a.ravel() for a in arrays]
    n = flat[0].size
    r0, v, flags = _space_motion(*flat)
    t_ref = float(epoch_jyear)
    t_end = float(end_jyear) - t_ref
    t = np.full(n, float(start_jyear) - t_ref)
    allowance = 1.0 + FK4_DISTORTION_ALLOWANCE

    def lookup(sel, times, margin):
        res = _locate_vectors(
            _direction_at(r0[sel], v[sel], times),
            (sel.size,),
            reduction,
            margin,
            np.zeros(sel.size),
            np.zeros(sel.size, dtype=np.int64),
            compare=False,
        )
        return res.index, res.margin_arcsec

    everyone = np.arange(n)
    current, _ = lookup(everyone, t, False)
    start_index = current.copy()
    prev_t = t.copy()
    found_star, found_t, found_from, found_to = [], [], [], []
    active = np.ones(n, dtype=bool)
    for _ in range(max_iterations):
        sel = np.flatnonzero(active)
        if sel.size == 0:
            break
        idx, margin = lookup(sel, t[sel], True)
        changed = idx != current[sel]
        if np.any(changed):
            cs = sel[changed]
            lo, t_hi = prev_t[cs].copy(), t[cs].copy()
            c_lo, c_target = current[cs], idx[changed]
            for _ in range(8):  # one bisection per crossing found inside the step
                hi = t_hi.copy()
                c_hi = c_target.copy()
                width = float(np.max(hi - lo))
                n_halve = max(
                    1, math.ceil(math.log2(max(width, 1e-300) / CROSSING_EPOCH_TOLERANCE_YR))
                )
                for _ in range(n_halve):
                    mid = 0.5 * (lo + hi)
                    c_mid, _m = lookup(cs, mid, False)
                    same = c_mid == c_lo
                    lo = np.where(same, mid, lo)
                    hi = np.where(same, hi, mid)
                    c_hi = np.where(same, c_hi, c_mid)
                found_star.append(cs)
                found_t.append(0.5 * (lo + hi) + t_ref)
                found_from.append(c_lo)
                found_to.append(c_hi)
                more = c_hi != c_target
                if not np.any(more):
                    break
                cs, lo, t_hi = cs[more], hi[more], t_hi[more]
                c_lo, c_target = c_hi[more], c_target[more]
            current[sel[changed]] = idx[changed]
        done = t[sel] >= t_end
        active[sel[done]] = False
        go = ~done
        sel, margin = sel[go], margin[go]
        if sel.size == 0:
            continue
        ts = t[sel]
        span = np.minimum(step, t_end - ts)
        reach = 0.999 * (margin / ARCSEC_PER_RAD)
        # Note 1: the longest safe step among trial lengths span, span/10, ...: the speed
        # bound over a shorter trial leaves out a fast passage later in the span.
        omega = _angular_speed_bound(r0[sel], v[sel], ts, ts + span) * allowance
        with np.errstate(divide="ignore"):
            safe = np.where(omega > 0.0, reach / omega, np.inf)
        # No trial can allow more than the speed at ts allows (ceiling); try shorter ones
        # only where that would more than double the step.
        trial = span / 10.0
        todo = np.flatnonzero(safe < trial)
        ceiling = np.full(sel.size, np.inf)
        if todo.size:
            k = sel[todo]
            with np.errstate(divide="ignore"):
                speed_now = _angular_speed_bound(r0[k], v[k], ts[todo], ts[todo]) * allowance
                ceiling[todo] = reach[todo] / speed_now
            todo = todo[ceiling[todo] > 2.0 * safe[todo]]
        while todo.size:
            k = sel[todo]
            omega = _angular_speed_bound(r0[k], v[k], ts[todo], ts[todo] + trial[todo])
            with np.errstate(divide="ignore", invalid="ignore"):
                ok = np.where(omega > 0.0, reach[todo] / (omega * allowance), np.inf)
            safe[todo] = np.maximum(safe[todo], np.minimum(ok, trial[todo]))
            trial[todo] = trial[todo] / 10.0
            keep = (safe[todo] < trial[todo]) & (ceiling[todo] > 2.0 * safe[todo])
            todo = todo[keep & (trial[todo] > CROSSING_MIN_STEP_YR)]
        h = np.minimum(np.maximum(safe, CROSSING_MIN_STEP_YR), span)
        prev_t[sel] = ts
        t[sel] = np.where(h >= t_end - ts, t_end, ts + h)
    flags = flags | np.where(active, int(ConstellationFlag.SEARCH_INCOMPLETE), 0)
    unfinished = np.flatnonzero(active)
    if unfinished.size:  # Note 6: the window's end, not where the search stopped
        current[unfinished], _ = lookup(unfinished, np.full(unfinished.size, t_end), False)

    if found_star:
        star = np.concatenate(found_star)
        epoch = np.concatenate(found_t)
        frm = np.concatenate(found_from)
        to = np.concatenate(found_to)
        order = np.lexsort((epoch, star))
        star, epoch, frm, to = star[order], epoch[order], frm[order], to[order]
    else:
        star = np.zeros(0, dtype=np.int64)
        epoch = np.zeros(0)
        frm = to = np.zeros(0, dtype=np.int16)
    return BoundaryCrossings(
        star=star,
        epoch_jyear=epoch,
        from_index=frm,
        to_index=to,
        start_index=start_index,
        end_index=current.copy(),
        count=np.bincount(star, minlength=n),
        flags=flags.astype(np.uint16),
    )


# ---------------------------------------------------------------------------------------
# Outlines
# ---------------------------------------------------------------------------------------

#: Initial spacing of outline vertices along each boundary arc, degrees.
OUTLINE_INITIAL_SPACING_DEG = 0.25
#: Default largest distance (arcsec) between the true transformed boundary and the
#: straight line between consecutive outline vertices in (longitude, latitude).
DEFAULT_OUTLINE_TOLERANCE_ARCSEC = 0.05
#: The range of outline tolerances accepted, arcsec.
MIN_OUTLINE_TOLERANCE_ARCSEC = 0.001
MAX_OUTLINE_TOLERANCE_ARCSEC = 60.0
#: Limit on halvings of an outline edge (2**-20 of 0.25 degrees is below 1 mas).
_OUTLINE_MAX_HALVINGS = 20


def _edge_table():
    """Elementary boundary edges: kind, j, i, side-a, side-b (see _elementary_edges)."""
    (hj, hi, hs, hn), (vj, vi, vw, ve) = _elementary_edges()
    kind = np.concatenate([np.zeros(hj.size, np.int8), np.ones(vj.size, np.int8)])
    return (
        kind,
        np.concatenate([hj, vj]),
        np.concatenate([hi, vi]),
        np.concatenate([hs, vw]),
        np.concatenate([hn, ve]),
    )


@functools.cache
def _rings(x: int) -> tuple:
    """Closed rings of directed elementary edges around constellation ``x``.

    Each ring is a tuple of (edge id, forward) with the constellation on the left of the
    direction of travel in the (RA, Dec) plane (RA increasing to the east).
    """
    table = boundary_table()
    nr = table.ra_edges_h.size - 1
    kind, ej, ei, side_a, side_b = _edge_table()
    outgoing: dict = {}
    for e in np.flatnonzero((side_a == x) | (side_b == x)):
        j, i = int(ej[e]), int(ei[e])
        if kind[e] == 0:  # constant Dec at dec_edges[j], RA from ra_edges[i] to [i+1]
            a, b = (i % nr, j), ((i + 1) % nr, j)
            forward = side_b[e] == x  # north side is x: walk east
        else:  # constant RA at ra_edges[i], Dec from dec_edges[j] to [j+1]
            a, b = (i % nr, j), (i % nr, j + 1)
            forward = side_a[e] == x  # west side is x: walk north
        start, end = (a, b) if forward else (b, a)
        outgoing.setdefault(start, []).append((int(e), bool(forward), end))
    rings = []
    while outgoing:
        node = next(iter(outgoing))
        ring = []
        first = node
        while True:
            e, forward, end = outgoing[node].pop()
            if not outgoing[node]:
                del outgoing[node]
            ring.append((e, forward))
            node = end
            if node == first and node not in outgoing:
                break
            if node == first and ring:
                break
        rings.append(tuple(ring))
    return tuple(rings)


def _edge_points_b1875(edge_ids, t):
    """B1875.0 unit vectors at parameter t in [0, 1] along elementary edges."""
    table = boundary_table()
    kind, ej, ei, _a, _b = _edge_table()
    ra_e = table.ra_edges_h * 15.0
    dec_e = table.dec_edges_deg
    k, j, i = kind[edge_ids], ej[edge_ids], ei[edge_ids]
    ra = np.where(k == 0, ra_e[i] + t * (ra_e[np.minimum(i + 1, ra_e.size - 1)] - ra_e[i]), ra_e[i])
    dec = np.where(
        k == 0, dec_e[j], dec_e[j] + t * (dec_e[np.minimum(j + 1, dec_e.size - 1)] - dec_e[j])
    )
    return _unit_vectors(ra, dec)


def _frame_from_icrs(frame: str, equinox):
    """Function mapping ICRS unit vectors (N, 3) to (lon_deg, lat_deg) in ``frame``."""
    if frame == "icrs":
        return _angles_deg
    if frame == "galactic":

        def to_galactic(vec):
            ra, dec = _angles_deg(vec)
            lon, lat = erfa.icrs2g(ra * RAD_PER_DEG, dec * RAD_PER_DEG)
            return np.mod(lon * DEG_PER_RAD, 360.0), lat * DEG_PER_RAD

        return to_galactic
    if frame == "fk5":
        m = _fk5_rotation(float(2000.0 if equinox is None else equinox))
        return lambda vec: _angles_deg(_apply(m, vec))
    if frame == "fk4":
        eq = float(1950.0 if equinox is None else equinox)
        m = _fk4_rotation(eq, eq)
        e_terms = _fk4_e_terms(eq)
        return lambda vec: _angles_deg(_add_e_terms(_apply(m, vec), e_terms))
    raise ValueError(f"frame must be one of {OUTLINE_FRAMES}, not {frame!r}")


def _wrap180(x):
    return (x + 180.0) % 360.0 - 180.0


def _densify(edge_ids, project, tolerance_arcsec):
    """Vertices along each edge, refined until chords in (lon, lat) follow the boundary.

    Returns a dict edge id -> (t, lon_deg, lat_deg) arrays sorted by t. The vertices of an
    edge depend only on the edge and the frame, so neighbouring outlines share them.
    """
    table = boundary_table()
    kind, ej, ei, _a, _b = _edge_table()
    ra_e = table.ra_edges_h * 15.0
    dec_e = table.dec_edges_deg
    k, j, i = kind[edge_ids], ej[edge_ids], ei[edge_ids]
    length = np.where(
        k == 0,
        (ra_e[np.minimum(i + 1, ra_e.size - 1)] - ra_e[i]) * np.cos(dec_e[j] * RAD_PER_DEG),
        dec_e[np.minimum(j + 1, dec_e.size - 1)] - dec_e[j],
    )
    nseg = np.maximum(1, np.ceil(np.abs(length) / OUTLINE_INITIAL_SPACING_DEG)).astype(int)
    eid = np.repeat(edge_ids, nseg + 1)
    t = np.concatenate([np.linspace(0.0, 1.0, m + 1) for m in nseg])

    lon, lat = project(_edge_points_b1875(eid, t))
    tol_rad = tolerance_arcsec / ARCSEC_PER_RAD
    for _ in range(_OUTLINE_MAX_HALVINGS):
        same = eid[1:] == eid[:-1]
        pair = np.flatnonzero(same)
        tm = 0.5 * (t[pair] + t[pair + 1])
        lon_m, lat_m = project(_edge_points_b1875(eid[pair], tm))
        chord_lon = lon[pair] + 0.5 * _wrap180(lon[pair + 1] - lon[pair])
        chord_lat = 0.5 * (lat[pair] + lat[pair + 1])
        err = _gc_distance(
            chord_lon * RAD_PER_DEG,
            chord_lat * RAD_PER_DEG,
            lon_m * RAD_PER_DEG,
            lat_m * RAD_PER_DEG,
        )
        bad = err > tol_rad
        if not np.any(bad):
            break
        eid = np.concatenate([eid, eid[pair[bad]]])
        t = np.concatenate([t, tm[bad]])
        lon = np.concatenate([lon, lon_m[bad]])
        lat = np.concatenate([lat, lat_m[bad]])
        order = np.lexsort((t, eid))
        eid, t, lon, lat = eid[order], t[order], lon[order], lat[order]
    out = {}
    bounds = np.flatnonzero(np.diff(eid)) + 1
    for chunk in np.split(np.arange(eid.size), bounds):
        out[int(eid[chunk[0]])] = (t[chunk], lon[chunk], lat[chunk])
    return out


def _signed_area(x, y):
    return 0.5 * float(np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y))


def _split_vertical(poly, cut_x):
    """Split a simple planar polygon (M, 2) by the line x = cut_x.

    Returns (pieces west of the line, pieces east of it), each a list of (K, 2) arrays.

    Notes
    -----
    1. Crossing points are paired along the cut line in order of y (the polygon's interior
       on the line is the union of those intervals); each side's pieces are traced by
       following that side's boundary chains and jumping along the cut between partners.
    """
    east = poly[:, 0] >= cut_x
    if east.all():
        return [], [poly]
    if not east.any():
        return [poly], []
    m = poly.shape[0]
    verts, tags = [], []  # tag: -1 ordinary vertex, else crossing number
    crossings = []
    for a in range(m):
        b = (a + 1) % m
        verts.append(poly[a])
        tags.append(-1)
        if east[a] != east[b]:
            (x0, y0), (x1, y1) = poly[a], poly[b]
            f = (cut_x - x0) / (x1 - x0)
            q = np.array([cut_x, y0 + f * (y1 - y0)])
            verts.append(q)
            tags.append(len(crossings))
            crossings.append(q[1])
    verts = np.array(verts)
    tags = np.array(tags)
    order = np.argsort(np.array(crossings), kind="stable")
    partner = np.empty(len(crossings), dtype=int)
    partner[order[0::2]] = order[1::2]
    partner[order[1::2]] = order[0::2]
    pos_of = {int(c): int(p) for p, c in enumerate(tags) if c >= 0}
    n = len(verts)
    # chains: from each crossing to the next one along the ring (>= 1 vertex between)
    chains = {}
    for c, p in pos_of.items():
        pts = [verts[p]]
        k = (p + 1) % n
        while tags[k] < 0:
            pts.append(verts[k])
            k = (k + 1) % n
        pts.append(verts[k])
        chains[c] = (pts, int(tags[k]), bool(pts[1][0] >= cut_x))
    result = ([], [])
    for want_east in (False, True):
        unused = {c for c, ch in chains.items() if ch[2] is want_east}
        while unused:
            start = min(unused)
            ring = []
            c = start
            while c in unused:
                unused.discard(c)
                pts, end_c, _ = chains[c]
                ring.extend(pts)
                c = int(partner[end_c])
            result[int(want_east)].append(np.array(ring))
    return result


def _open_over_pole(lonu, lat, closing: float, winding: int) -> np.ndarray:
    """The planar polygon of a ring winding once around a pole (Note 1 of _ring_pieces).

    ``lonu`` are the unwrapped longitudes of the ring's vertices and ``closing`` that of
    its first vertex after one turn (``lonu[0] + 360 * winding``). Returns (M, 2) vertices
    from the chosen antimeridian crossing (x = X) once around to the same point (x = X +
    360 * winding), then to the pole and back along the pole's latitude line.
    """
    x = np.append(lonu, closing)  # the ring once around, its first vertex repeated
    y = np.append(lat, lat[0])
    x0, x1, y0, y1 = x[:-1], x[1:], y[:-1], y[1:]
    # antimeridians X = 180 + 360 k met by each edge [x0, x1) (x0 <= X < x1 or x1 < X <= x0)
    lo, hi = np.minimum(x0, x1), np.maximum(x0, x1)
    best = None
    for k in range(
        int(math.floor((x.min() - 180.0) / 360.0)), int(math.ceil((x.max() - 180.0) / 360.0)) + 1
    ):
        cut = 180.0 + 360.0 * k
        hit = np.flatnonzero((lo <= cut) & (cut <= hi) & (x0 != x1))
        if hit.size == 0:
            continue
        yc = y0[hit] + (cut - x0[hit]) / (x1[hit] - x0[hit]) * (y1[hit] - y0[hit])
        j = int(np.argmax(yc) if winding > 0 else np.argmin(yc))
        if best is None or (yc[j] > best[2] if winding > 0 else yc[j] < best[2]):
            best = (int(hit[j]), cut, float(yc[j]))
    edge, cut, yc = best
    turn = 360.0 * winding
    n = lonu.size
    # from the crossing on edge (edge, edge + 1) along the ring back to the same crossing
    after = np.arange(edge + 1, edge + 1 + n) % n
    xs = lonu[after] + np.where(after <= edge, turn, 0.0)
    pole = 90.0 if winding > 0 else -90.0
    xs = np.concatenate([[cut], xs, [cut + turn, cut + turn, cut]])
    ys = np.concatenate([[yc], lat[after], [yc, pole, pole]])
    return np.column_stack([xs, ys])


#: Vertices this close to an antimeridian (degrees; 3.6 microarcseconds) are taken as on it.
CUT_SNAP_DEG = 1e-9


def _straighten_cut_runs(x, y):
    """A piece's ring with each run of consecutive vertices on the cut line (x = -180 or
    180) reduced to the run's first and last vertex.

    Where a boundary lies on the antimeridian itself (hour circle 12h in the B1875 frame),
    the pieces of :func:`_split_vertical` go along the cut line and back (a spike of no
    width, which GeoJSON readers reject as a self-intersection); along a line the ring can
    only go from where it meets the line to where it leaves it.
    """
    on = np.abs(x) == 180.0
    if not on.any() or on.all():
        return x, y
    start = int(np.argmin(on))  # begin off the line, so that no run wraps around the end
    x, y, on = np.roll(x, -start), np.roll(y, -start), np.roll(on, -start)
    keep = ~on
    i, n = 0, x.size
    while i < n:
        if not on[i]:
            i += 1
            continue
        j = i
        while j + 1 < n and on[j + 1] and x[j + 1] == x[i]:
            j += 1
        keep[i] = keep[j] = True
        i = j + 1
    return x[keep], y[keep]


def _ring_pieces(lon, lat):
    """GeoJSON rings (lists of [lon, lat], lon in -180..180) for one closed outline ring.

    Notes
    -----
    1. Longitudes are unwrapped along the ring. A ring that winds once around a pole of
       the frame (its region contains that pole: the north pole if it winds eastward, the
       region being on the left) is opened where it crosses the antimeridian nearest that
       pole and closed along the antimeridian and the pole's latitude line: one polygon
       from -180 to 180 whose edges at -180 and 180 are the two sides of the cut. (Opened
       on another meridian, the cut at 180 would make two polygons sharing that meridian
       as an edge, which the Simple Features rules GeoJSON readers apply do not allow.)
       Nearest the pole, the closing line up to the pole cannot cross the ring.
    2. The planar polygon is then cut along lon = 180 + 360 k and each piece shifted into
       -180..180 (RFC 7946 section 3.1.9, antimeridian cutting).
    3. Exterior rings are counterclockwise (RFC 7946 section 3.1.6, right-hand rule).
    """
    lonu = lon[0] + np.concatenate([[0.0], np.cumsum(_wrap180(np.diff(lon)))])
    closing = lonu[-1] + _wrap180(lon[0] - lon[-1])
    winding = int(round((closing - lonu[0]) / 360.0))
    if winding != 0:
        poly = _open_over_pole(lonu, np.asarray(lat, dtype=float), closing, winding)
    else:
        poly = np.column_stack([lonu, lat])
    # Vertices within CUT_SNAP_DEG of an antimeridian are put on it: a boundary lying on
    # it (12h in frames at equinox B1875.0) arrives a few 1e-11 degree either side.
    near = np.round((poly[:, 0] - 180.0) / 360.0) * 360.0 + 180.0
    snap = np.abs(poly[:, 0] - near) <= CUT_SNAP_DEG
    poly[snap, 0] = near[snap]
    lo, hi = poly[:, 0].min(), poly[:, 0].max()
    pieces = [poly]
    k0 = int(math.floor((lo - 180.0) / 360.0))
    k1 = int(math.ceil((hi - 180.0) / 360.0))
    for k in range(k0, k1 + 1):
        cut = 180.0 + 360.0 * k
        if not (lo < cut < hi):
            continue
        new = []
        for piece in pieces:
            west, east = _split_vertical(piece, cut)
            new.extend(west)
            new.extend(east)
        pieces = new
    out = []
    for piece in pieces:
        shift = 360.0 * math.floor((0.5 * (piece[:, 0].min() + piece[:, 0].max()) + 180.0) / 360.0)
        x = np.clip(piece[:, 0] - shift, -180.0, 180.0)
        x, y = _straighten_cut_runs(x, piece[:, 1])
        keep = np.ones(x.size, dtype=bool)
        keep[1:] = (np.diff(x) != 0.0) | (np.diff(y) != 0.0)
        x, y = x[keep], y[keep]
        if x.size > 1 and x[0] == x[-1] and y[0] == y[-1]:
            x, y = x[:-1], y[:-1]
        if x.size < 3:
            continue
        if _signed_area(x, y) < 0.0:
            x, y = x[::-1], y[::-1]
        ring = np.column_stack([np.append(x, x[0]), np.append(y, y[0])])
        out.append(ring)
    return out


def outline(
    constellation,
    *,
    frame: str = "icrs",
    equinox=None,
    reduction: str = "fk4",
    tolerance_arcsec: float = DEFAULT_OUTLINE_TOLERANCE_ARCSEC,
) -> dict:
    """Outline of one constellation as a GeoJSON Feature (RFC 7946).

    Parameters
    ----------
    constellation : str or int
        IAU abbreviation (case-insensitive) or index.
    frame : {"icrs", "galactic", "fk5", "fk4", "b1875"}
        Frame of the coordinates: ICRS; galactic (IAU 1958 via ICRS, ERFA ``icrs2g``); FK5
        at a Julian ``equinox`` (default J2000.0, IAU 1976 precession); FK4 at a Besselian
        ``equinox`` (default B1950.0, E-terms included, FK4 realised at the equinox
        epoch); or the B1875.0 frame of the reduction itself.
    equinox : float, optional
        Julian (fk5) or Besselian (fk4) epoch of the equinox, years.
    reduction : {"fk4", "fk5", "fk5_iau1976"}
        Which B1875.0 frame the boundaries are taken to be drawn in (see
        :func:`icrs_to_b1875`).
    tolerance_arcsec : float
        Largest distance between the transformed boundary and the straight (lon, lat)
        lines joining the vertices, arcsec (Note 2).

    Returns
    -------
    dict
        GeoJSON Feature: geometry Polygon, or MultiPolygon when the constellation has two
        parts (Serpens) or is cut at the antimeridian; longitudes in -180..180 and
        latitudes in degrees; properties give the abbreviation, name, frame, equinox,
        reduction and the solid angle in steradians and square degrees.

    Notes
    -----
    1. The boundary is made of the table's arcs (constant RA or Dec at B1875.0), each
       sampled and carried through the inverse reduction and into the frame.
    2. Vertices are added (by halving) until the midpoint of every straight (lon, lat)
       segment is within ``tolerance_arcsec`` of the true transformed arc, so the polygon
       stays correct after transformation; the vertices of an arc depend only on the arc,
       so neighbouring outlines share them and the 88 outlines tile the sphere.
    3. Antimeridian and poles: see :func:`_ring_pieces`.
    """
    table = boundary_table()
    x = (
        constellation
        if isinstance(constellation, int | np.integer)
        else constellation_index(constellation)
    )
    x = int(x)
    if frame not in OUTLINE_FRAMES:
        raise ValueError(f"frame must be one of {OUTLINE_FRAMES}, not {frame!r}")
    if reduction not in REDUCTIONS:
        raise ValueError(f"reduction must be one of {REDUCTIONS}, not {reduction!r}")
    if not (math.isfinite(tolerance_arcsec) and tolerance_arcsec > 0):
        raise ValueError("tolerance_arcsec must be positive")
    polygons = _outline_polygons([x], frame, equinox, reduction, tolerance_arcsec)[x]
    if len(polygons) == 1:
        geometry = {"type": "Polygon", "coordinates": polygons[0]}
    else:
        geometry = {"type": "MultiPolygon", "coordinates": polygons}
    return {
        "type": "Feature",
        "geometry": geometry,
        "properties": {
            "abbreviation": table.abbreviations[x],
            "name": table.names[x],
            "frame": frame,
            "equinox": _default_equinox(frame, equinox),
            "reduction": reduction,
            "area_sr": float(table.area_sr[x]),
            "area_deg2": float(table.area_sr[x] * DEG_PER_RAD**2),
        },
    }


def _default_equinox(frame, equinox):
    if frame == "fk5":
        return 2000.0 if equinox is None else float(equinox)
    if frame == "fk4":
        return 1950.0 if equinox is None else float(equinox)
    if frame == "b1875":
        return BOUNDARY_BESSELIAN_EPOCH
    return None


#: Sets of outline settings whose densified edges are kept (for all 88: 0.7 MB at the
#: default tolerance, 2.5 MB at the finest, 0.001 arcsec).
_DENSIFIED_SETTINGS_KEPT = 8


@functools.lru_cache(maxsize=_DENSIFIED_SETTINGS_KEPT)
def _densified_edges(frame, equinox, reduction, tolerance_arcsec) -> dict:
    """Edge id -> (t, lon_deg, lat_deg) of every edge densified so far with these settings
    (filled by :func:`_outline_polygons`; ``equinox`` as :func:`_default_equinox` gives it).

    An edge's vertices depend only on the edge and the settings (Note 2 of
    :func:`outline`), so each is computed once per settings and shared by every outline,
    chart and request after it; the settings least recently used are dropped beyond
    _DENSIFIED_SETTINGS_KEPT.
    """
    return {}


def _edges_of(indices, frame, equinox, reduction, tolerance_arcsec) -> tuple[dict, dict]:
    """The rings of the constellations ``indices`` and the kept edges with these settings,
    every edge of those rings computed (:func:`_densified_edges`)."""
    if not MIN_OUTLINE_TOLERANCE_ARCSEC <= tolerance_arcsec <= MAX_OUTLINE_TOLERANCE_ARCSEC:
        # Below the minimum the arcs are cut ever finer (at 0, until memory runs out).
        raise ValueError(
            f"tolerance_arcsec must be from {MIN_OUTLINE_TOLERANCE_ARCSEC} to "
            f"{MAX_OUTLINE_TOLERANCE_ARCSEC}, not {tolerance_arcsec}"
        )
    if frame == "b1875":

        def project(vec):
            return _angles_deg(vec)

    else:
        to_lonlat = _frame_from_icrs(frame, equinox)

        def project(vec):
            return to_lonlat(b1875_to_icrs(vec, reduction))

    rings = {x: _rings(x) for x in indices}
    edge_ids = np.unique([e for x in indices for ring in rings[x] for e, _f in ring])
    dense = _densified_edges(frame, _default_equinox(frame, equinox), reduction, tolerance_arcsec)
    missing = [e for e in edge_ids.tolist() if e not in dense]
    if missing:
        for e, arrays in _densify(np.array(missing), project, tolerance_arcsec).items():
            for a in arrays:
                a.setflags(write=False)
            dense[e] = arrays
    return rings, dense


def _outline_polygons(indices, frame, equinox, reduction, tolerance_arcsec):
    """GeoJSON polygon coordinate lists (list of rings, each list of [lon, lat]) per index."""
    rings, dense = _edges_of(indices, frame, equinox, reduction, tolerance_arcsec)
    out = {}
    for x in indices:
        polys = []
        for ring in rings[x]:
            lons, lats = [], []
            for e, forward in ring:
                _t, lon, lat = dense[e]
                if not forward:
                    lon, lat = lon[::-1], lat[::-1]
                lons.append(lon[:-1])
                lats.append(lat[:-1])
            for piece in _ring_pieces(np.concatenate(lons), np.concatenate(lats)):
                polys.append([np.round(piece, 10).tolist()])
        out[x] = polys
    return out


def warm_up_outlines() -> None:
    """Compute and keep the vertices of every boundary edge for the default outline
    settings (ICRS, FK4 reduction, DEFAULT_OUTLINE_TOLERANCE_ARCSEC; about 0.1 s and 0.7 MB),
    which web applications and charts ask for first (see :func:`_densified_edges`)."""
    every = range(len(boundary_table().abbreviations))
    _edges_of(every, "icrs", None, "fk4", DEFAULT_OUTLINE_TOLERANCE_ARCSEC)


def outline_collection(
    *,
    frame: str = "icrs",
    equinox=None,
    reduction: str = "fk4",
    tolerance_arcsec: float = DEFAULT_OUTLINE_TOLERANCE_ARCSEC,
) -> dict:
    """Outlines of all 88 constellations as a GeoJSON FeatureCollection (see outline).

    Each Feature is the one :func:`outline` gives for that constellation, properties
    included (the solid angle too).
    """
    table = boundary_table()
    indices = list(range(len(table.abbreviations)))
    polygons = _outline_polygons(indices, frame, equinox, reduction, tolerance_arcsec)
    features = []
    for x in indices:
        geometry = (
            {"type": "Polygon", "coordinates": polygons[x][0]}
            if len(polygons[x]) == 1
            else {"type": "MultiPolygon", "coordinates": polygons[x]}
        )
        features.append(
            {
                "type": "Feature",
                "geometry": geometry,
                "properties": {
                    "abbreviation": table.abbreviations[x],
                    "name": table.names[x],
                    "frame": frame,
                    "equinox": _default_equinox(frame, equinox),
                    "reduction": reduction,
                    "area_sr": float(table.area_sr[x]),
                    "area_deg2": float(table.area_sr[x] * DEG_PER_RAD**2),
                },
            }
        )
    return {"type": "FeatureCollection", "features": features}


def constellation_list() -> list[dict]:
    """The 88 IAU constellations: abbreviation, name and solid angle (B1875.0 table)."""
    table = boundary_table()
    return [
        {
            "abbreviation": a,
            "name": nm,
            "area_sr": float(area),
            "area_deg2": float(area * DEG_PER_RAD**2),
        }
        for a, nm, area in zip(table.abbreviations, table.names, table.area_sr, strict=True)
    ]
