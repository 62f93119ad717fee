"""Deep image prior for low-dose multi-mask data (optional: the ``neural`` extra, PyTorch on the CPU).

Ulyanov, Vedaldi, Lempitsky, "Deep Image Prior", CVPR 2018: an untrained convolutional network
G_theta with a fixed random input z is itself the prior. The field is its output,
x = s (G_theta(z)[0] + i G_theta(z)[1]), and theta is fitted to the data, here by the Poisson
negative log-likelihood of the frames, sum_k,r mu - y log mu with mu = |F(m_k x)|^2 (the same
model as ``method="poisson"``). Convolutional networks fit natural structure long before they fit
noise, so the fit is stopped early: here by the discrepancy principle, when the Poisson deviance
of the fit falls to its expected value for Poisson data (``priors.expected_deviance``), or at the
iteration budget.

Network: a small encoder-decoder (two 2x down/up-sampling levels with skip connections, 3x3
convolutions, batch normalisation, leaky ReLU), as in the paper's hourglass family, scaled down
for a 2-core CPU: at 128x128 and the default 16 channels one Adam step costs about a
second, and a reconstruction a few minutes (``bench/deep_prior_bench.py``). Deterministic for a
given seed (torch's CPU kernels, one thread set by the caller if bit-reproducibility matters).

PyTorch is never a core dependency: importing this module does not import torch; calling
``deep_prior_reconstruct`` without it raises ``ReconstructionInputError`` saying how to install
the extra (``pip install 'maskrun[neural]'``, which pins the CPU build this machine ships).
"""
from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Callable

import numpy as np

from .priors import expected_deviance, poisson_deviance
from .validation import ReconstructionInputError, check_intensities, check_masks

__all__ = ["DeepPriorResult", "deep_prior_reconstruct", "torch_available"]


def torch_available() -> bool:
    try:
        import torch  # noqa: F401
    except ImportError:
        return False
    return True


@dataclass
class DeepPriorResult:
    estimate: np.ndarray  # complex128 (H, W), sqrt(counts)
    iterations: int
    stop_reason: str  # "discrepancy" (fit as good as the noise allows), "iterations" or "time budget"
    deviance: np.ndarray  # per iteration
    deviance_target: float
    elapsed_s: float


def _network(torch, channels_in: int, channels: int):
    nn = torch.nn

    def block(cin, cout):
        return nn.Sequential(nn.Conv2d(cin, cout, 3, padding=1, padding_mode="circular"), nn.BatchNorm2d(cout),
                             nn.LeakyReLU(0.2))

    class Hourglass(nn.Module):
        def __init__(self):
            super().__init__()
            c = channels
            self.e0 = block(channels_in, c)
            self.e1 = nn.Sequential(nn.AvgPool2d(2), block(c, c))
            self.e2 = nn.Sequential(nn.AvgPool2d(2), block(c, c), block(c, c))
            self.up = nn.Upsample(scale_factor=2, mode="bilinear", align_corners=False)
            self.d1 = block(2 * c, c)
            self.d0 = block(2 * c, c)
            self.out = nn.Conv2d(c, 2, 1)

        def forward(self, z):
            a0 = self.e0(z)
            a1 = self.e1(a0)
            a2 = self.e2(a1)
            b1 = self.d1(torch.cat([self.up(a2), a1], 1))
            b0 = self.d0(torch.cat([self.up(b1), a0], 1))
            return self.out(b0)

    return Hourglass()


def deep_prior_reconstruct(intensities, masks, *, iterations: int = 1500, channels: int = 16,
                           learning_rate: float = 0.01, seed: int = 0, stop_at_discrepancy: bool = True,
                           time_budget_s: float | None = None,
                           progress: Callable[[int, int, float, float], None] | None = None) -> DeepPriorResult:
    """Fit an untrained network's output to the Poisson likelihood of the frames (see the module docstring).

    intensities : (K, H, W) photon counts; masks : (K, H, W) complex; H and W divisible by 4.
    progress : called as progress(iteration, iterations, deviance, target) every 10 iterations.
    """
    try:
        import torch
    except ImportError:
        raise ReconstructionInputError(
            "the deep image prior needs PyTorch: pip install 'maskrun[neural]' (the CPU build); "
            "or use prior='tv' with method='poisson', which needs nothing more.") from None
    m = check_masks(masks)
    y = check_intensities(intensities, m.shape)
    K, H, W = m.shape
    if H % 4 or W % 4:
        raise ReconstructionInputError(f"the deep image prior's network halves the grid twice: H and W must be "
                                       f"divisible by 4; got {H} x {W}.")
    t0 = time.perf_counter()
    torch.manual_seed(seed)
    rng = np.random.default_rng(seed)
    zin = 8
    z = torch.from_numpy(0.1 * rng.standard_normal((1, zin, H, W)).astype(np.float32))
    net = _network(torch, zin, channels)
    mt = torch.from_numpy(m.astype(np.complex64))
    yt = torch.from_numpy(y.astype(np.float32))
    w = np.sum(np.abs(m) ** 2, axis=0)
    scale = float(np.sqrt(y.sum() / max(float(w.sum()), 1e-30)))  # rms field that carries the measured photons
    eps = 1e-6 * float(y.mean())
    opt = torch.optim.Adam(net.parameters(), lr=learning_rate)
    deviances: list[float] = []
    target = np.nan
    reason = "iterations"
    best = None
    it = 0
    for it in range(1, iterations + 1):
        opt.zero_grad()
        out = net(z)[0]
        x = scale * torch.complex(out[0], out[1])
        field = torch.fft.fft2(mt * x, norm="ortho")
        mu = field.real ** 2 + field.imag ** 2 + eps
        loss = torch.sum(mu - yt * torch.log(mu)) / (K * H * W)
        loss.backward()
        opt.step()
        mu_np = mu.detach().numpy().astype(np.float64)
        dev = poisson_deviance(y, mu_np)
        deviances.append(dev)
        if it == 1 or it % 10 == 0:
            target = float(np.sum(expected_deviance(mu_np)))
            if progress is not None:
                progress(it, iterations, dev, target)
        best = x.detach().numpy().astype(np.complex128)
        if stop_at_discrepancy and it % 10 == 0 and dev <= target:
            reason = "discrepancy"
            break
        if time_budget_s is not None and time.perf_counter() - t0 >= time_budget_s:
            reason = "time budget"
            break
    return DeepPriorResult(estimate=best, iterations=it, stop_reason=reason, deviance=np.asarray(deviances),
                           deviance_target=target, elapsed_s=time.perf_counter() - t0)
