"""How long and how much memory an edit will roughly take, before it is sent. No bpy, no torch.

Memory is the solver's own pre-flight figure (isoclay.estimates.estimate_memory, the one the
service refuses jobs by, bundled verbatim by the build). Time is
a rough fit of measured runs (`isoclay remesh` of icospheres, one thread, this 2-core machine):
fitting took 3.05 / 5.22 / 9.05 s for 20k / 82k / 328k faces at field detail 128, extraction
2.2-2.8 s at surface detail 256, the correspondence 0.3-1.0 s; the task itself adds its own
(deform, smooth and sharpen each run their own loop; figures below are typical, not bounds). The
field refines blocks only near the surface where the shape needs them, so at its default 1024 it
costs about what the dense 128-cell field did (a 15k-vertex rod fitted in 1.2 s; a 35k-vertex scan
in 6.4 s on a busy machine).
"""

from __future__ import annotations

from dataclasses import dataclass

from .estimates import estimate_memory  # copied verbatim from solver/isoclay/estimates.py by addon/build.py

#: Fit: seconds at field detail 128 = FIT_BASE_S + FIT_PER_FACE_S x faces (least squares on the runs above).
FIT_BASE_S = 2.7
FIT_PER_FACE_S = 1.95e-5
#: Extraction at surface detail 256 (narrow band: grows with the square of the detail).
EXTRACT_S = 2.5
#: Typical time of the task's own work on two cores (deform: L-BFGS steps; smooth/sharpen: grid flows).
TASK_S = {"deform": 5.0, "smooth": 15.0, "sharpen": 10.0, "remesh": 0.0}
#: Above either, the panel says so before the edit is sent (half the solver's default 8 GiB limit).
NOTE_SECONDS = 30.0
NOTE_BYTES = 4 * 2**30


@dataclass(frozen=True)
class Estimate:
    """seconds : rough wall time; bytes : the solver's pre-flight peak-memory figure."""

    seconds: float
    bytes: int

    @property
    def large(self) -> bool:
        return self.seconds > NOTE_SECONDS or self.bytes > NOTE_BYTES


def estimate(task: str, n_vertices: int, n_faces: int, field_detail: int = 1024, surface_detail: int = 256) -> Estimate:
    """The edit's rough time and memory for a mesh of n_vertices and n_faces triangles."""
    fit = FIT_BASE_S + FIT_PER_FACE_S * n_faces  # the sparse field at 1024 costs about what the dense 128 did
    extract = EXTRACT_S * (surface_detail / 256.0) ** 2
    seconds = fit + extract + TASK_S.get(task, 0.0)
    return Estimate(seconds, estimate_memory(task, n_vertices, n_faces, {"fit": {"resolution": field_detail}}))


def note(n_vertices: int, n_faces: int, field_detail: int, surface_detail: int) -> str:
    """A line for the panel when the object is large ("" otherwise)."""
    worst = max((estimate(t, n_vertices, n_faces, field_detail, surface_detail) for t in TASK_S),
                key=lambda e: e.seconds)
    base = estimate("remesh", n_vertices, n_faces, field_detail, surface_detail)
    if not worst.large:
        return ""
    return (f"{n_vertices:,} vertices: an edit takes about {base.seconds:.0f}-{worst.seconds:.0f} s and up to "
            f"{worst.bytes / 2**30:.1f} GiB; continue, or lower Field detail for a faster first try")
