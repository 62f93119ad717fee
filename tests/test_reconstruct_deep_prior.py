"""Deep image prior (optional `neural` extra): skipped cleanly without PyTorch."""
import numpy as np
import pytest

from maskrun.reconstruct import ReconstructionInputError, octanary_masks, relative_error, solve
from maskrun.reconstruct.deep_prior import deep_prior_reconstruct, torch_available


def test_without_torch_the_error_says_how_to_install_it():
    if torch_available():
        pytest.skip("PyTorch is installed here")
    with pytest.raises(ReconstructionInputError, match=r"maskrun\[neural\]"):
        deep_prior_reconstruct(np.ones((2, 8, 8)), octanary_masks(2, (8, 8)))


def test_deep_prior_beats_unregularised_poisson_at_low_dose():
    pytest.importorskip("torch")
    from test_reconstruct_priors import low_dose_case

    # Ulyanov, Vedaldi, Lempitsky, CVPR 2018: the untrained network fits structure before noise;
    # stopped by the discrepancy principle it lowers the error of the unregularised estimate
    y, m, truth = low_dose_case(1, n=32)
    seen = []
    r = deep_prior_reconstruct(y, m, iterations=400, channels=16, progress=lambda *a: seen.append(a))
    plain = relative_error(truth, solve(y, m, method="poisson").estimate)
    assert r.estimate.shape == truth.shape and np.all(np.isfinite(r.estimate))
    assert relative_error(truth, r.estimate) < plain
    assert seen and seen[0][0] == 1 and r.stop_reason in ("discrepancy", "iterations")
    with pytest.raises(ReconstructionInputError, match="divisible by 4"):
        deep_prior_reconstruct(y[:, :30, :30], m[:, :30, :30])
