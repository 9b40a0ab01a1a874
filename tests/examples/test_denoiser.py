"""The demo's hand-written convolution: correct against torch, and the slipped one subtly wrong."""
import numpy as np
import pytest
import torch
import torch.nn.functional as F

from refops.examples.denoiser import TileDenoiser, synthetic_tiles, tile_conv, tile_conv_slipped

CONFIGS = [
    dict(in_channels=2, out_channels=4, kernel_size=3, stride=1, padding=1, dilation=1, groups=1, bias=True),
    dict(in_channels=4, out_channels=4, kernel_size=2, stride=1, padding="same", dilation=1, groups=4, bias=True),
    dict(in_channels=2, out_channels=2, kernel_size=(2, 3), stride=(2, 1), padding=(1, 0), dilation=(1, 2),
         groups=2, bias=False),
    dict(in_channels=3, out_channels=6, kernel_size=4, stride=1, padding="same", dilation=1, groups=3, bias=True),
]


def grads_of(layer, x, g):
    xt = torch.tensor(x, requires_grad=True)
    layer(xt).backward(torch.tensor(g))
    return xt.grad.numpy(), layer.weight.grad.numpy()


def torch_reference(layer, config, x):
    # Reference: torch.nn.functional.conv2d in float64 with autograd.
    xt = torch.tensor(x, requires_grad=True)
    w = layer.weight.detach().clone().requires_grad_(True)
    b = None if layer.bias is None else layer.bias.detach().clone()
    out = F.conv2d(xt, w, b, stride=config["stride"], padding=config["padding"], dilation=config["dilation"],
                   groups=config["groups"])
    return xt, w, out


@pytest.mark.parametrize("config", CONFIGS, ids=range(len(CONFIGS)))
def test_correct_layer_matches_torch(config):
    torch.manual_seed(0)
    layer = tile_conv(**config).double()
    x = np.random.default_rng(1).standard_normal((2, config["in_channels"], 7, 8))
    xt, w, out = torch_reference(layer, config, x)
    ours = layer(torch.tensor(x))
    np.testing.assert_allclose(ours.detach().numpy(), out.detach().numpy(), rtol=1e-12, atol=1e-12)
    g = np.random.default_rng(2).standard_normal(out.shape)
    out.backward(torch.tensor(g))
    grad_x, grad_w = grads_of(layer, x, g)
    np.testing.assert_allclose(grad_x, xt.grad.numpy(), rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(grad_w, w.grad.numpy(), rtol=1e-12, atol=1e-12)


def test_slip_hides_under_symmetric_padding_and_shows_with_odd_same_padding():
    # Reference: torch conv2d autograd. Symmetric padding (CONFIGS[0]) agrees; "same" with an even
    # kernel (CONFIGS[1], total padding 1) gives a wrong input gradient.
    x = np.random.default_rng(3).standard_normal((1, 4, 6, 6))
    for config, should_agree in ((CONFIGS[0], True), (CONFIGS[1], False)):
        torch.manual_seed(0)
        layer = tile_conv_slipped(**config).double()
        xs = x[:, :config["in_channels"]]
        xt, w, out = torch_reference(layer, config, xs)
        g = np.ones(out.shape)
        out.backward(torch.tensor(g))
        grad_x, _ = grads_of(layer, xs, g)
        assert np.allclose(grad_x, xt.grad.numpy(), rtol=1e-12, atol=1e-12) is should_agree


def test_denoiser_is_residual_and_tiles_are_reproducible():
    # A residual block computes y = x + F(x) (common practice): zero weights give the identity.
    model = TileDenoiser().double()
    with torch.no_grad():
        model.merge.weight.zero_()
        model.merge.bias.zero_()
    tiles = synthetic_tiles(2, 12, seed=5)
    np.testing.assert_array_equal(model(torch.tensor(tiles)).detach().numpy(), tiles)
    np.testing.assert_array_equal(tiles, synthetic_tiles(2, 12, seed=5))
    assert tiles.shape == (2, 1, 12, 12)
