"""stackdr: target-aimed convex stacking of nuisance learners for doubly robust functionals."""

__version__ = "0.1.0"
