"""Energies: volumetric elasticity of a lattice map, mesh distortion measures, curvature flows and feature filters (import the submodules)."""
