"""Physical constants used by rtemu [SI unless stated].

Values are the CODATA 2018 exact / recommended values (NIST, https://physics.nist.gov/cuu/
Constants/), checked against ``scipy.constants`` in ``tests/test_planck.py``.
"""

PLANCK_CONSTANT = 6.62607015e-34  # h [J s], exact (SI 2019)
SPEED_OF_LIGHT = 299792458.0  # c [m s-1], exact
BOLTZMANN_CONSTANT = 1.380649e-23  # k [J K-1], exact (SI 2019)

#: First radiation constant for radiance, c1L = 2 h c^2 [W m2 sr-1]
C1_RADIANCE = 2.0 * PLANCK_CONSTANT * SPEED_OF_LIGHT**2
#: Second radiation constant c2 = h c / k [m K]
C2 = PLANCK_CONSTANT * SPEED_OF_LIGHT / BOLTZMANN_CONSTANT

STANDARD_GRAVITY = 9.80665  # g [m s-2], CGPM 1901 conventional value
DRY_AIR_GAS_CONSTANT = 287.05  # R_d [J kg-1 K-1], dry-air value in common use
EPSILON = 0.622  # ratio of molar masses water/dry air [1] (rounded, as used by the model)
COSMIC_BACKGROUND_TEMPERATURE = 2.725  # T_cosmic [K]
