"""Physical and astronomical constants used by the core, each with unit and source.

Every constant the core uses lives here, named with its unit (and its source where more
than one value is in circulation).
"""

import math

#: Astronomical unit, metres (exact; IAU 2012 Resolution B2).
AU_M = 149_597_870_700.0

#: Julian year, days (exact by definition; IAU 1976 system, IAU 2006 Resolution B3 use).
JULIAN_YEAR_DAYS = 365.25

#: Day, seconds (SI; exact).
DAY_S = 86_400.0

#: Julian year, seconds (exact: 365.25 d x 86400 s).
JULIAN_YEAR_S = JULIAN_YEAR_DAYS * DAY_S

#: One astronomical unit per Julian year expressed in km/s: the transverse-velocity factor
#: ``A`` of the Hipparcos Catalogue (ESA 1997, Vol. 1, section 1.5.5, Table 1.2.2 quotes the
#: rounded 4.74047). Derived here from the exact IAU 2012 au: 4.740470463533348 km/s.
AU_PER_JULIAN_YEAR_KM_S = AU_M / 1000.0 / JULIAN_YEAR_S

#: Parsec, astronomical units (IAU 2015 Resolution B2: 648000/pi au, exact).
PC_AU = 648_000.0 / math.pi

#: Parsec, kilometres (derived from the two exact values above).
PC_KM = PC_AU * AU_M / 1000.0

#: Speed of light, km/s (SI, exact).
C_KM_S = 299_792.458

#: Heliocentric gravitational constant, m^3 s^-2 (IAU 2015 Resolution B3, nominal solar mass
#: parameter).
GM_SUN_M3_S2 = 1.3271244e20

#: Speed of light, au per Julian year (derived from exact values).
C_AU_PER_JULIAN_YEAR = C_KM_S / AU_PER_JULIAN_YEAR_KM_S

#: Julian date of the epoch J2000.0, TT (IAU 1976 / IAU 2006 definition: 2000 January 1.5 TT).
JD_J2000 = 2_451_545.0

#: Offset between Julian date and modified Julian date, days (MJD = JD - 2400000.5).
MJD_ZERO_JD = 2_400_000.5

#: Besselian epoch origin B1900.0 as a Julian date and the length of the tropical year in
#: days, as used by SOFA/ERFA epb2jd/epb (Lieske 1979, A&A 73, 282).
JD_B1900 = 2_415_020.313_52
TROPICAL_YEAR_DAYS_LIESKE1979 = 365.242_198_781

#: Milliarcseconds per radian, and degrees <-> radians, spelled out for readability.
MAS_PER_RAD = 180.0 / math.pi * 3_600_000.0
ARCSEC_PER_RAD = 180.0 / math.pi * 3_600.0
DEG_PER_RAD = 180.0 / math.pi
RAD_PER_DEG = math.pi / 180.0

#: Total proper motion above which an input is implausible, mas/yr. The largest known
#: stellar proper motion is about 10.4 arcsec/yr (common practice, from memory); a larger
#: value usually means a unit mistake (e.g. arcsec given as mas, or RA motion without cos dec).
IMPLAUSIBLE_PROPER_MOTION_MAS_YR = 10_400.0

#: Radial velocity (in size) above which an input is implausible, km/s. No star's measured
#: radial velocity comes near it (from memory: hypervelocity stars leave the Galaxy at about
#: 1,000 km/s, and the stars closest to the black hole at the Galactic centre reach a few
#: thousand km/s at pericentre); a larger value usually means m/s given as km/s (common
#: practice as a unit check).
IMPLAUSIBLE_RADIAL_VELOCITY_KM_S = 5_000.0

#: Parallax above which an input is implausible, mas: a distance under 1 pc. The largest
#: known stellar parallax is about 768 mas (from memory; the tests name the star and the
#: catalogue); 1,000 mas, nearer than 1 pc, is a round bound above every known star
#: (common practice). A larger value usually means microarcseconds given
#: as milliarcseconds (the annual parallax of a place observed is then 1,000 times too large).
IMPLAUSIBLE_PARALLAX_MAS = 1_000.0

#: Space velocity above which an input is implausible: half the speed of light, the
#: threshold SOFA/ERFA starpm uses to cap the speed ("excessive speed", status 2), km/s.
IMPLAUSIBLE_SPACE_VELOCITY_KM_S = 0.5 * C_KM_S

# --- Bounds on inputs (the API's star tables and the batch jobs) ------------------------

#: Largest magnitude accepted for parallaxes, proper motions and their standard errors, in
#: mas and mas/yr. Far beyond any star (a parallax of 1e10 mas is a distance of 0.02 au; a
#: proper motion of 1e10 mas/yr is 2,800 deg/yr), it keeps every product in the models and
#: their covariances finite, so no input overflows into a meaningless answer.
MAX_ABS_MAS = 1e10

#: Largest distance (and distance error) accepted, pc: 1e10 pc, about the radius of the
#: observable universe (common practice), with the same purpose.
MAX_DISTANCE_PC = 1e10

#: Smallest distance accepted, pc: 1e-7 pc (0.02 au), the distance of the largest parallax
#: accepted (MAX_ABS_MAS). Nearer, 1000/distance overflows for the smallest doubles and
#: the proper motions that follow are infinite.
MIN_DISTANCE_PC = 1e-7
