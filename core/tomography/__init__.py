"""Reflection traveltime tomography: the joint inversion and the layered forward model."""
