"""Input checks of maskrun.reconstruct over widely varying inputs (hypothesis)."""
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from maskrun.reconstruct import ReconstructionInputError, forward, octanary_masks
from maskrun.reconstruct.validation import check_intensities, check_masks


shapes = st.tuples(st.integers(1, 4), st.integers(1, 9), st.integers(1, 9))


@settings(max_examples=60, deadline=None)
@given(data=st.data(), shape=shapes)
def test_negative_counts_are_clamped_and_nothing_else_changes(data, shape):
    y = data.draw(hnp.arrays(np.float32, shape, elements=st.floats(-50, 1e6, width=32)))
    if not np.any(y > 0):
        with pytest.raises(ReconstructionInputError, match="zero everywhere"):
            check_intensities(y, shape)
        return
    before = y.copy()
    out = check_intensities(y, shape)
    assert out.shape == shape and out.dtype == np.float64
    np.testing.assert_array_equal(out, np.maximum(y.astype(np.float64), 0))
    np.testing.assert_array_equal(y, before)  # the caller's frames are not modified


@settings(max_examples=40, deadline=None)
@given(shape=shapes, k=st.integers(0, 3), i=st.integers(0, 8), j=st.integers(0, 8),
       bad=st.sampled_from([np.nan, np.inf, -np.inf]))
def test_non_finite_values_are_named_with_their_frame(shape, k, i, j, bad):
    y = np.ones(shape)
    k, i, j = k % shape[0], i % shape[1], j % shape[2]
    y[k, i, j] = bad
    with pytest.raises(ReconstructionInputError, match=rf"frames \[{k}\]"):
        check_intensities(y, shape)


@settings(max_examples=40, deadline=None)
@given(shape=shapes, other=shapes)
def test_shape_mismatch_is_reported_with_both_shapes(shape, other):
    if other == shape:
        return
    with pytest.raises(ReconstructionInputError, match="does not match masks shape"):
        check_intensities(np.ones(other), shape)


@settings(max_examples=30, deadline=None)
@given(k=st.integers(1, 5), h=st.integers(1, 12), w=st.integers(1, 12), seed=st.integers(0, 1000))
def test_parseval_holds_for_any_grid(k, h, w, seed):
    # Parseval's theorem for the unitary DFT (numpy norm="ortho"): energy is conserved per mask.
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((h, w)) + 1j * rng.standard_normal((h, w))
    m = octanary_masks(k, (max(h, 2), max(w, 2)), seed=seed)[:, :h, :w]
    y = forward(x, m)
    np.testing.assert_allclose(y.sum(axis=(1, 2)), np.sum(np.abs(m * x) ** 2, axis=(1, 2)), rtol=1e-10)


def test_mask_checks():
    with pytest.raises(ReconstructionInputError, match=r"\(K, H, W\)"):
        check_masks(np.ones((2, 2, 2, 2)))
    with pytest.raises(ReconstructionInputError, match="NaN"):
        check_masks(np.full((2, 3, 3), np.nan))
    with pytest.raises(ReconstructionInputError, match="numeric"):
        check_masks(np.array([[["a", "b"], ["c", "d"]]]))
    with pytest.raises(ReconstructionInputError, match="zero everywhere"):
        check_masks(np.zeros((3, 4, 4)))
    assert check_masks(np.ones((2, 3, 3), np.float32)).dtype == np.complex64
    assert check_masks(np.ones((2, 3, 3), bool)).dtype == np.complex128
    assert check_masks(np.ones((2, 3, 3), int)).dtype == np.complex128
    assert check_masks(np.ones((3, 3)), warn_k1=False).shape == (1, 3, 3)
