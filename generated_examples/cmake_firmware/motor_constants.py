"""Data-sheet constants of the demo motor, kept in their own file the way a team shares them
between the model and other tools. The model imports this module: the CMake build regenerates
the filter when either file changes. (Invented values for the demo.)"""

KT = 0.05        # torque constant [N*m/A]
INERTIA = 2.0e-5  # rotor and load inertia [kg*m^2]
DAMPING = 1.0e-5  # viscous friction [N*m*s/rad]
ENCODER_COUNTS = 4096  # counts per revolution
