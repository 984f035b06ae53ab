"""Physical constants, each with the source it is taken from."""

#: Mean radius of the Earth in metres, the value of Williamson et al. (1992),
#: "A standard test set for numerical approximations to the shallow water
#: equations in spherical geometry", J. Comput. Phys. 102, 211-224, table of
#: constants in section 2. Most global models use a radius within 0.01 % of it.
EARTH_RADIUS = 6.37122e6

#: Rotation rate of the Earth in rad s-1, the nominal mean angular velocity of
#: IERS Conventions (2010), Petit & Luzum (eds.), IERS Technical Note 36,
#: table 1.1 (from memory).
EARTH_ROTATION_RATE = 7.292115e-5
