"""The windowing primitive, its adjoint, padding and the output-size rule."""
import numpy as np
import pytest
import torch
import torch.nn.functional as F

from refops.ops import _window


def test_windows_picks_the_documented_elements():
    # Values 10*i + j encode their position, so a wrong window is visible at a glance.
    x = (10 * np.arange(5)[:, None] + np.arange(6)[None, :]).astype(float)
    view = _window.windows(x, kernel=(2, 2), stride=(2, 1), dilation=(1, 2))
    assert view.shape == (2, 4, 2, 2)
    # Worked by hand: window (1, 3) starts at row 2, column 3; dilation 2 skips one column.
    np.testing.assert_array_equal(view[1, 3], [[23, 25], [33, 35]])
    assert not view.flags.writeable


@pytest.mark.parametrize("shape, kernel, stride, dilation", [
    ((2, 3, 7), (3,), (2,), (1,)),
    ((1, 2, 6, 5), (2, 3), (1, 2), (2, 1)),
    ((2, 1, 5, 4, 6), (2, 1, 3), (2, 3, 1), (1, 1, 2)),
    ((3, 4), (4, 1), (3, 3), (1, 1)),
])
def test_fold_is_the_adjoint_of_windows(shape, kernel, stride, dilation):
    # Dot-product test (Claerbout 1992): <windows(x), y> = <x, fold(y)>.
    rng = np.random.default_rng(0)
    x = rng.standard_normal(shape)
    view = _window.windows(x, kernel, stride, dilation)
    y = rng.standard_normal(view.shape)
    folded = _window.fold(y, x.shape[len(shape) - len(kernel):], stride, dilation)
    assert folded.shape == x.shape
    assert np.isclose(np.sum(view * y), np.sum(x * folded), rtol=1e-13)


@pytest.mark.parametrize("mode, torch_mode", [
    ("zeros", "constant"), ("reflect", "reflect"), ("replicate", "replicate"), ("circular", "circular")])
@pytest.mark.parametrize("pairs", [((1, 2), (0, 3)), ((2, 2), (1, 1)), ((0, 0), (3, 0))])
def test_pad_and_unpad_match_torch(mode, torch_mode, pairs):
    # Reference: torch.nn.functional.pad (float64) and its autograd for the adjoint.
    rng = np.random.default_rng(1)
    x = rng.standard_normal((2, 3, 4, 5))
    flat = tuple(p for pair in reversed(pairs) for p in pair)  # torch lists the last dim first
    xt = torch.tensor(x, requires_grad=True)
    padded_t = F.pad(xt, flat, mode=torch_mode)
    padded = _window.pad(x, pairs, mode)
    np.testing.assert_array_equal(padded, padded_t.detach().numpy())
    g = rng.standard_normal(padded.shape)
    padded_t.backward(torch.tensor(g))
    np.testing.assert_allclose(_window.unpad(g, pairs, mode), xt.grad.numpy(), rtol=1e-14, atol=1e-14)


@pytest.mark.parametrize("size, kernel, stride, dilation, pad", [
    (5, 3, 1, 1, 0), (5, 4, 1, 1, 2), (6, 3, 2, 1, 1), (7, 3, 2, 2, 0), (9, 3, 3, 2, 1), (1, 1, 1, 1, 0)])
def test_output_size_follows_the_published_relation(size, kernel, stride, dilation, pad):
    # Dumoulin & Visin (2016): o = floor((i + 2p - d(k - 1) - 1) / s) + 1.
    expected = (size + 2 * pad - dilation * (kernel - 1) - 1) // stride + 1
    assert _window.output_size(size, kernel, stride, dilation, pad, pad) == expected


@pytest.mark.parametrize("size, kernel, stride, pad", [(5, 2, 2, 0), (6, 3, 2, 1), (7, 3, 3, 1), (4, 2, 3, 1)])
def test_ceil_mode_output_size_matches_torch_pooling(size, kernel, stride, pad):
    # Reference: torch max_pool1d with ceil_mode=True (drops a last window starting in the padding).
    out = F.max_pool1d(torch.zeros(1, 1, size), kernel, stride, pad, ceil_mode=True)
    assert _window.output_size(size, kernel, stride, 1, pad, pad, ceil_mode=True) == out.shape[-1]


def test_same_padding_puts_the_odd_element_high():
    # Contract: "same" with an odd total padding puts the extra row/column on the right/bottom.
    assert _window.padding_pairs("same", 2, kernel=(4, 3), dilation=(1, 2), stride=(1, 1)) == ((1, 2), (2, 2))
    with pytest.raises(ValueError, match=r"padding='same'.*stride=\(2, 1\)"):
        _window.padding_pairs("same", 2, kernel=(3, 3), dilation=(1, 1), stride=(2, 1))
