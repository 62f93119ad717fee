"""maskrun.reconstruct - multi-mask phase retrieval: right, fast, incremental.

Pure numerics (numpy, scipy; numba compiles the fused kernels of the solvers' hot
loops, with a numpy fallback): no devices, no I/O except ``load_masks``.

Model
-----
The camera records y_k = |F(m_k * x)|^2, k = 0..K-1 (``forward``): x is the
complex field leaving the sample on the reconstruction grid (units:
sqrt(photons)), m_k the known masks (K, H, W), F the unitary 2-D DFT (numpy
``norm="ortho"``, zero frequency at [0, 0], no fftshift). Intensities are
expected photon counts. Near-field setups: ``angular_spectrum`` propagates
a field in physical units (warns when the grid aliases), and
``solve(..., propagation=NearField(wavelength_m, pixel_pitch_m, distance_m))``
(also accepted by ``IncrementalEngine``) reconstructs from near-field
frames, modelled by ``forward_near_field``; all solvers work unchanged
because the propagator is unitary (it costs twice the FFTs).

Which solver when
-----------------
``solve(y, masks)`` with the default ``method="auto"`` is right for almost
everything; it runs ``"hybrid"`` (``"raar"`` when K <= 4):

* ``"hybrid"`` (default for K >= 5): RAAR until the data residual is below
  2 %, then error reduction. Fastest to 1e-6 and to 1e-10 on noiseless
  K = 8 octanary data (see bench/recon_bench.py), and converges to the
  amplitude least-squares point on noisy data, which is within a few per
  cent of the Cramér-Rao bound at high counts (bench: MSE/CRB = 1.02 at
  ~1e3 photons per pixel).
* ``"er"``: error reduction alone. Cheapest iteration (2K FFTs), monotone;
  best for polishing an estimate that is already close (the incremental
  engine uses it between frame sets of a static sample). Stagnates with
  K <= 4.
* ``"raar"``: RAAR alone (beta = 0.9); default for K <= 4 (K = 3 octanary
  masks still converge), and the choice with support / non-negativity
  constraints or when ER stagnates.
* ``"wf"``: Wirtinger flow with spectral initialization, the published
  reference algorithm; ML for Gaussian intensity noise
  (``noise_model="gaussian"`` selects it). Needs ~5x more iterations
  (527 vs 103 to 1e-10 at 256x256, K = 8) and is inefficient on shot noise
  (MSE/CRB = 1.7).
* ``"hio"`` (default for K = 1): Fienup's hybrid input-output for one
  far-field pattern of an isolated object (or a few masks), with a support
  (given, or from the autocorrelation refined by shrink-wrap) and optional
  non-negativity; oversampling check, twin-image remedy and restarts on
  stagnation (``hio``, ``support``); compare with
  ``ambiguities.relative_error_modulo_ambiguities`` (shift, twin, phase).
* ``prior="tv"`` with ``"poisson"``: total-variation regularised Poisson
  likelihood for low-dose data, weight by the discrepancy principle
  (``priors``). See docs/reconstruction-methods.md for the low-dose table.
* ``"poisson"``: Poisson maximum likelihood by L-BFGS, started from ER
  (``noise_model="poisson"`` selects it). Use for shot-noise-limited data
  when the last factor of precision matters: its MSE approaches the
  Poisson Cramér-Rao bound (``poisson_crb``). Runs in float64; dearer per
  iteration.

Live reconstruction: ``IncrementalEngine(masks, mode="accumulate" | "follow")``
and ``engine.update(frame_set)`` once per frame set (bounded work, warm
start, shot-noise error estimate in every ``EngineUpdate``; one core, so
acquisition keeps the other).

Precision a dose allows: ``shot_noise_relative_error(pixels, photons)`` (any
size), ``poisson_crb(x, masks, photon_scale)`` and ``relative_error_bound``
(exact bound on small grids, <= 32x32).

Mask families: ``octanary_masks`` (coded-diffraction plates),
``random_phase_masks`` (phase SLM), ``quantized_phase_masks`` (N-level SLM
with a lookup table), ``binary_amplitude_masks`` (DMD), ``load_masks``
(.npy / .npz).

Precision and speed: precision follows the input, as in numpy: ``solve`` and
the engine compute in complex64 when the frames and masks are single precision
(float32 frames, complex64 masks: errors down to ~1e-6) and in complex128 when
either is double (1e-10 and below); ``dtype=`` chooses explicitly (the daemon
asks for complex64). ``iterations`` is a budget: the default tolerance suits
the precision in use, and ``SolveResult.stop_reason`` says why a run stopped
("tolerance", "precision floor", "iterations", "time budget", "stalled"). Buffers are preallocated, FFTs batched over the K masks;
the FFT backend (numpy.fft or scipy.fft with workers) and the split of the
masks over threads are measured per problem shape and the fastest is kept
(``fft`` module, ``solvers.Workspace``). The ``"poisson"`` method computes
in float64 whatever the dtype.

Bad input
---------
Shape mismatches, NaN/inf intensities or masks, all-zero frame sets, masks
that are zero everywhere, unknown options: ``ReconstructionInputError``
(a ValueError) with a message saying what to do. Negative intensities
(normal after dark subtraction) are clamped to 0 silently: this is the
documented behaviour. K = 1: ``NotUniquelySolvableWarning`` (it still runs).
Pixels dark in every mask: ``UnilluminatedPixelsWarning`` and the estimate
is 0 there.
"""
from .bounds import CRBResult, poisson_crb, relative_error_bound, shot_noise_relative_error
from .incremental import EngineUpdate, IncrementalEngine
from .masks import (binary_amplitude_masks, load_masks, mask_weight, octanary_masks, quantized_phase_masks,
                    random_phase_masks)
from .metrics import align_global_phase, amplitude_residual, relative_error
from .propagation import (AliasingWarning, NearField, aliasing_margin_m, angular_spectrum,
                          angular_spectrum_max_distance_m, forward, forward_near_field)
from .solvers import METHODS, SolveResult, solve
from .validation import NotUniquelySolvableWarning, ReconstructionInputError, UnilluminatedPixelsWarning

__all__ = [
    "octanary_masks", "random_phase_masks", "quantized_phase_masks", "binary_amplitude_masks", "load_masks",
    "mask_weight", "forward", "forward_near_field", "NearField", "angular_spectrum", "aliasing_margin_m", "angular_spectrum_max_distance_m", "AliasingWarning",
    "solve", "SolveResult", "METHODS", "relative_error", "align_global_phase", "amplitude_residual",
    "IncrementalEngine", "EngineUpdate", "shot_noise_relative_error", "poisson_crb", "relative_error_bound",
    "CRBResult", "ReconstructionInputError", "NotUniquelySolvableWarning", "UnilluminatedPixelsWarning",
]
