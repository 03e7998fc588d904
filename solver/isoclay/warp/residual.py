"""An invertible space warp from residual blocks with a Lipschitz bound (Behrmann et al. 2019, "Invertible Residual Networks").

Each block is b(x) = x + r(x) with Lip(r) <= c < 1, so b is a bi-Lipschitz homeomorphism:
its Jacobian I + J_r has every singular value in [1 - c, 1 + c] (never singular, positive
determinant), and b^-1(z) is the unique fixed point of x <- z - r(x), reached at rate c.

r(x) = W_out [h(x); x] + b_out with h = softplus layers on a positional encoding gamma(x).
Lipschitz bookkeeping (all norms are exact spectral norms, recomputed on every call):
    gamma = [x, sin(w x), cos(w x)] / sqrt(1 + sum w^2)   -> Lip(gamma) <= 1
    hidden layers ||W|| <= 1, softplus slope <= 1        -> Lip(h) <= 1
    [h; x] stacks two 1-Lipschitz maps                    -> Lip <= sqrt(2)
    ||W_out|| <= c / sqrt(2)                              -> Lip(r) <= c
The direct x in the output layer lets a block hold a linear map (a partial rotation or
scaling) exactly; the encoding lets it bend space more locally. Few frequencies keep the
encoding's scale factor, and so the usable slope of h, large (more blocks rather than
more frequencies). The output layer starts at zero: every block, and so the warp, starts
as the identity.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field

import torch

from ..errors import SolverFailure
from .jets import Jet, concat


@dataclass(frozen=True)
class WarpConfig:
    """Shape of a residual warp.

    blocks : residual blocks composed (each can rotate space by up to ~2 asin(c/2) rad)
    width : hidden units per block
    depth : hidden layers per block
    frequencies : positional-encoding angular frequencies, radians per unit-box length
    lipschitz : bound c < 1 on each residual (closer to 1: more freedom, slower inverse)
    beta : softplus sharpness (1/length of the smooth knee, unit-box lengths)
    rigid : put a learnable rigid motion in front of the blocks, d(y) = B(R^T (y - t)), so
        the whole object can turn by any angle and the blocks only hold the non-rigid rest
    """

    blocks: int = 4
    width: int = 32
    depth: int = 1
    frequencies: tuple[float, ...] = ()
    lipschitz: float = 0.9
    beta: float = 16.0
    rigid: bool = True

    @classmethod
    def from_dict(cls, d: dict) -> "WarpConfig":
        d = dict(d)
        d["frequencies"] = tuple(float(w) for w in d.get("frequencies", ()))
        return cls(**d)


def _spectral_scale(weight: torch.Tensor, bound: float) -> torch.Tensor:
    """weight scaled down (never up) so its largest singular value is at most bound."""
    sigma = torch.linalg.matrix_norm(weight, ord=2)
    return weight * torch.clamp(bound / sigma.clamp(min=1e-12), max=1.0)


class ResidualBlock(torch.nn.Module):
    """x -> x + r(x), Lip(r) <= config.lipschitz (see module docstring)."""

    def __init__(self, config: WarpConfig, generator: torch.Generator | None = None):
        super().__init__()
        self.beta = float(config.beta)
        self.lipschitz = float(config.lipschitz)
        freqs = torch.tensor(config.frequencies, dtype=torch.float32).reshape(-1)
        self.register_buffer("freqs", freqs, persistent=False)
        self.pe_scale = 1.0 / math.sqrt(1.0 + float((freqs**2).sum()))
        dims = [3 + 6 * len(freqs)] + [config.width] * config.depth
        self.hidden = torch.nn.ParameterList()
        self.hidden_bias = torch.nn.ParameterList()
        for a, b in zip(dims[:-1], dims[1:]):
            w = torch.randn(b, a, generator=generator) / math.sqrt(a)
            self.hidden.append(torch.nn.Parameter(w))
            # knees spread over the unit box so the block can bend anywhere in it
            self.hidden_bias.append(torch.nn.Parameter((torch.rand(b, generator=generator) - 0.5) * 0.6))
        self.out_weight = torch.nn.Parameter(torch.zeros(3, dims[-1] + 3))
        self.out_bias = torch.nn.Parameter(torch.zeros(3))

    def normalized_weights(self) -> tuple[list[torch.Tensor], torch.Tensor]:
        """Hidden weights scaled to spectral norm <= 1, output weight to <= c / sqrt(2)."""
        hidden = [_spectral_scale(w, 1.0) for w in self.hidden]
        out = _spectral_scale(self.out_weight, self.lipschitz / math.sqrt(2.0))
        return hidden, out

    def _encode(self, x: torch.Tensor) -> torch.Tensor:
        angles = (x[:, None, :] * self.freqs[:, None]).flatten(1)
        return torch.cat([x, torch.sin(angles), torch.cos(angles)], dim=1) * self.pe_scale

    def residual(self, x: torch.Tensor, weights=None) -> torch.Tensor:
        """r(x) for points (n, 3)."""
        hidden, out = weights if weights is not None else self.normalized_weights()
        h = self._encode(x)
        for w, b in zip(hidden, self.hidden_bias):
            h = torch.nn.functional.softplus(h @ w.T + b, beta=self.beta)
        return torch.cat([h, x], dim=1) @ out.T + self.out_bias

    def forward(self, x: torch.Tensor, weights=None) -> torch.Tensor:
        return x + self.residual(x, weights)

    def _encode_jet(self, jet: Jet) -> Jet:
        x, s = jet.value, self.pe_scale
        w = self.freqs[:, None]  # (F, 1)
        angles = (x[:, None, :] * w).flatten(1)  # (n, 3F), frequency-major
        sin, cos = torch.sin(angles), torch.cos(angles)
        wf = w.expand(-1, 3).flatten()  # (3F,)
        value = torch.cat([x, sin, cos], dim=1) * s
        d1 = d2 = None
        if jet.d1 is not None:
            dx = jet.d1.repeat(1, 1, len(self.freqs))  # (n, 3, 3F): coordinate c of each frequency
            d1 = torch.cat([jet.d1, cos[:, None] * wf * dx, -sin[:, None] * wf * dx], dim=2) * s
        if jet.d2 is not None:
            from .jets import _J, _K

            dxx = (jet.d1[:, _J] * jet.d1[:, _K]).repeat(1, 1, len(self.freqs))  # (n, 6, 3F)
            ddx = jet.d2.repeat(1, 1, len(self.freqs))
            w2 = wf * wf
            d2 = torch.cat(
                [jet.d2, -sin[:, None] * w2 * dxx + cos[:, None] * wf * ddx, -cos[:, None] * w2 * dxx - sin[:, None] * wf * ddx],
                dim=2,
            ) * s
        return Jet(value, d1, d2)

    def jet(self, jet: Jet, weights=None) -> Jet:
        """Push a jet of x through the block: the jet of x + r(x)."""
        hidden, out = weights if weights is not None else self.normalized_weights()
        h = self._encode_jet(jet)
        for w, b in zip(hidden, self.hidden_bias):
            a = h.linear(w, b)
            z = self.beta * a.value
            sig = torch.sigmoid(z)
            s2 = self.beta * sig * (1.0 - sig) if a.d2 is not None else None
            h = a.elementwise(torch.nn.functional.softplus(a.value, beta=self.beta), sig, s2)
        return jet + concat([h, jet]).linear(out, self.out_bias)

    def inverse(self, z: torch.Tensor, start: torch.Tensor | None, tolerance: float, max_iterations: int):
        """Solve x + r(x) = z by fixed-point iteration. Returns (x, iterations, last step size)."""
        weights = self.normalized_weights()
        x = z - self.residual(z, weights) if start is None else start.clone()
        step = torch.tensor(float("inf"))
        for it in range(1, max_iterations + 1):
            x_new = z - self.residual(x, weights)
            step = (x_new - x).abs().max() if len(x) else torch.tensor(0.0)
            x = x_new
            if step <= tolerance:
                return x, it, float(step)
        return x, max_iterations, float(step)


@dataclass(frozen=True)
class InverseResult:
    """points : (n, 3) d^-1 of the input; stages : per-block solutions (warm starts for a later call);
    iterations : fixed-point iterations per block; residual : max |d(points) - input| (unit-box lengths)."""

    points: torch.Tensor
    stages: list = field(repr=False)
    iterations: tuple[int, ...]
    residual: float


class ResidualWarp(torch.nn.Module):
    """d = b_K o ... o b_1 : deformed space -> input space; d^-1 by block-wise fixed points.

    forward(points (n, 3) float32) -> (n, 3); jet(points) -> Jet of d with exact first and
    second derivatives; inverse(points) -> InverseResult.
    """

    kind = "residual_warp"

    def __init__(self, config: WarpConfig = WarpConfig(), seed: int = 0):
        super().__init__()
        self.warp_config = config
        self.seed = int(seed)
        gen = torch.Generator().manual_seed(self.seed)
        self.blocks = torch.nn.ModuleList(ResidualBlock(config, gen) for _ in range(config.blocks))
        if config.rigid:
            # rotation vector (axis * angle) and translation of the deformation's rigid part
            self.rotation = torch.nn.Parameter(torch.zeros(3))
            self.translation = torch.nn.Parameter(torch.zeros(3))

    def rigid_matrix(self) -> torch.Tensor:
        """(3, 3) rotation R of the rigid part (identity without one), by the matrix exponential."""
        if not self.warp_config.rigid:
            return torch.eye(3)
        w = self.rotation
        zero = torch.zeros((), dtype=w.dtype)
        skew = torch.stack([torch.stack([zero, -w[2], w[1]]), torch.stack([w[2], zero, -w[0]]), torch.stack([-w[1], w[0], zero])])
        return torch.linalg.matrix_exp(skew)

    def set_rigid(self, rotation_vector, translation) -> None:
        """Start the rigid part at x -> R x + t (R from its rotation vector)."""
        with torch.no_grad():
            self.rotation.copy_(torch.as_tensor(rotation_vector, dtype=torch.float32))
            self.translation.copy_(torch.as_tensor(translation, dtype=torch.float32))

    def _unrigid(self, points: torch.Tensor) -> torch.Tensor:
        if not self.warp_config.rigid:
            return points
        return (points - self.translation) @ self.rigid_matrix()  # R^T (y - t), row vectors

    def config(self) -> dict:
        return {"warp": asdict(self.warp_config), "seed": self.seed}

    def forward(self, points: torch.Tensor) -> torch.Tensor:
        x = self._unrigid(points)
        for block in self.blocks:
            x = block(x)
        return x

    def jet(self, points: torch.Tensor, order: int = 2) -> Jet:
        """Jet of d at points: value (n, 3), d1[:, j, i] = d d_i / d y_j, d2[:, pair, i]."""
        jet = Jet.identity(points, order)
        if self.warp_config.rigid:
            rot = self.rigid_matrix()
            jet = Jet(self._unrigid(points), None if jet.d1 is None else jet.d1 @ rot, jet.d2)
        for block in self.blocks:
            jet = block.jet(jet)
        return jet

    def jacobian(self, points: torch.Tensor) -> torch.Tensor:
        """(n, 3, 3) J[:, i, j] = d d_i / d y_j."""
        return self.jet(points, order=1).d1.transpose(1, 2)

    @torch.no_grad()
    def inverse(
        self,
        points: torch.Tensor,
        warm: list | None = None,
        tolerance: float = 1e-6,
        max_iterations: int = 300,
        check: bool = True,
        chunk: int = 65536,
    ) -> InverseResult:
        """d^-1(points) for (n, 3) points. warm : stages of an earlier InverseResult on the same
        points (a few iterations then suffice). Raises SolverFailure when a block's iteration
        has not settled to ``tolerance`` after ``max_iterations`` (check=True)."""
        if warm is None and len(points) > chunk:
            parts = [self.inverse(points[i : i + chunk], None, tolerance, max_iterations, check, chunk) for i in range(0, len(points), chunk)]
            stages = [torch.cat([p.stages[k] for p in parts]) for k in range(len(self.blocks))]
            its = tuple(max(p.iterations[k] for p in parts) for k in range(len(self.blocks)))
            return InverseResult(torch.cat([p.points for p in parts]), stages, its, max(p.residual for p in parts))
        z = points.detach()
        stages: list = [None] * len(self.blocks)
        iterations = [0] * len(self.blocks)
        for k in reversed(range(len(self.blocks))):
            start = None if warm is None else warm[k]
            z_prev, its, step = self.blocks[k].inverse(z, start, tolerance, max_iterations)
            if check and not step <= tolerance:
                raise SolverFailure(
                    f"inverting the warp did not converge (block {k + 1}: step {step:.2e} after {its} iterations); "
                    "lower the handle displacement or use a stiffer setting"
                )
            stages[k], iterations[k] = z_prev, its
            z = z_prev
        if self.warp_config.rigid:
            z = z @ self.rigid_matrix().T + self.translation
        residual = float((self.forward(z) - points).abs().max()) if len(points) else 0.0
        return InverseResult(z, stages, tuple(iterations), residual)
