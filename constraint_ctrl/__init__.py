"""constraint_ctrl: runtime constraint-based robot control.

The core (model, skill, solve, safety, runtime) is plain Python + numpy + casadi and never
imports a middleware; transport/ and nodes/ sit on top of it.
"""

__version__ = '0.1.0'
