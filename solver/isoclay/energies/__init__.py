"""Energies on surfaces and warps: stretch, bend, handles, volume, curvature flows (import the submodules)."""
