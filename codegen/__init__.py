"""pdgc: powered-descent guidance compiler.

Turns a vehicle file and a horizon into a parametric descent SOCP, solves it
as a reference in Python, generates dependency-free C for it, and checks the
generated solver against the reference.
"""

__version__ = "0.1.0"
