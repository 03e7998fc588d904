"""Limits the solver enforces, mirrored so the add-on's sliders cannot ask for what it refuses. No bpy.

tests/test_addon_limits.py checks each against the solver's own check (the solver accepts the
ends of each range and refuses just beyond them).
"""

FIELD_DETAIL_RANGE = (16, 1024)     # field.fit.FitConfig.validated: resolution
SURFACE_DETAIL_RANGE = (16, 1024)   # tasks remesh / smooth / sharpen / deform: resolution
SHARPEN_AMOUNT_RANGE = (0.01, 1.0)  # tasks.sharpen: amount above 0, at most 1
MAX_STRENGTH_REL = 0.25             # tasks.smooth.MAX_STRENGTH_REL: strength <= this x the longest side
MAX_RADIUS_REL = 0.4                # tasks.sharpen.MAX_RADIUS: radius <= this x the longest side
STIFFNESS_NAMES = ("rubber", "soft", "medium", "firm", "stiff")  # tasks.deform.STIFFNESS
CREASE_MODES = ("auto", "crisp", "soft")  # CONTRACTS 3: smooth creases
HOLE_FILL_MODES = ("auto", "smooth", "flat")  # extract.hole_fill.FILL_MODES: remesh hole_fill
