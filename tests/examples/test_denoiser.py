"""The demo port's hand-written kernels: the correct ones agree with torch, the slipped ones only
disagree where their slip shows."""
import importlib

import numpy as np
import pytest
import torch

from refops.examples import denoiser as demo


def conv(in_channels, out_channels, kernel_size, stride=1, padding=0, dilation=1, groups=1, bias=True,
         padding_mode="zeros"):
    return dict(in_channels=in_channels, out_channels=out_channels, kernel_size=kernel_size, stride=stride,
                padding=padding, dilation=dilation, groups=groups, bias=bias, padding_mode=padding_mode)


CONFIGS = {
    "plain-3x3": conv(2, 4, 3, padding=1),
    "same-even-kernel": conv(4, 4, 2, padding="same", groups=4),
    "grouped-strided-uneven": conv(4, 8, 3, stride=2, padding=1, groups=2),
    "pairs-dilated": conv(3, 3, (2, 3), stride=(2, 3), padding=(1, 2), dilation=(2, 1), groups=3, bias=False),
    "depthwise-strided-uneven": conv(2, 2, 3, stride=2, padding=1, groups=2),
    "dilated-strided-uneven": conv(2, 2, 3, stride=2, padding=2, dilation=2, groups=2),
    "reflect": conv(2, 2, 3, padding=2, dilation=2, groups=2, padding_mode="reflect"),
    "replicate-valid": conv(2, 4, (3, 1), stride=(1, 2), padding="valid", groups=2, padding_mode="replicate"),
    "circular-same": conv(2, 4, 4, padding="same", groups=2, padding_mode="circular"),
}
DEPTHWISE = [name for name, c in CONFIGS.items() if c["groups"] == c["in_channels"]]
SIZE = (7, 8)
# torch notes that an even kernel with padding="same" copies the input; that is not our concern here.
pytestmark = pytest.mark.filterwarnings("ignore:Using padding='same' with even kernel")


def forward_backward(module, x, g):
    """Output and input gradient of ``module`` at ``x`` with cotangent ``g``."""
    x = x.clone().requires_grad_(True)
    out = module(x)
    out.backward(g)
    return out.detach(), x.grad


def run(layer, x, g):
    """Output and gradients (input, weight, bias) of a conv layer."""
    return *forward_backward(layer, x, g), layer.weight.grad, None if layer.bias is None else layer.bias.grad


def reference(layer, config, x, g):
    # Reference: torch.nn.Conv2d (torch.nn.functional.conv2d) in float64 with autograd, same weights.
    module = torch.nn.Conv2d(**config).double()
    with torch.no_grad():
        module.weight.copy_(layer.weight)
        if module.bias is not None:
            module.bias.copy_(layer.bias)
    return run(module, x, g)


def case(factory, name, *, seed=0, size=SIZE):
    config = CONFIGS[name]
    layer = factory(**config, generator=torch.Generator().manual_seed(seed)).double()
    rng = np.random.default_rng(seed)
    x = torch.tensor(rng.standard_normal((2, config["in_channels"], *size)))
    g = torch.tensor(rng.standard_normal(layer(x).shape))
    return run(layer, x, g), reference(layer, config, x, g)


def close(a, b):
    return a is None and b is None or np.allclose(a.numpy(), b.numpy(), rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("name", list(CONFIGS))
def test_tile_conv_matches_torch(name):
    ours, theirs = case(demo.TileConv, name)
    for label, a, b in zip(("output", "input", "weight", "bias"), ours, theirs):
        assert close(a, b), f"{label} differs from torch in {name}"


@pytest.mark.parametrize("name", DEPTHWISE)
def test_depthwise_conv_matches_torch(name):
    ours, theirs = case(demo.DepthwiseConv, name)
    for label, a, b in zip(("output", "input", "weight", "bias"), ours, theirs):
        assert close(a, b), f"{label} differs from torch in {name}"


def test_depthwise_with_a_channel_multiplier_matches_torch():
    config = conv(2, 6, 3, stride=2, padding=1, groups=2)
    layer = demo.DepthwiseConv(**config, generator=torch.Generator().manual_seed(1)).double()
    x = torch.tensor(np.random.default_rng(1).standard_normal((2, 2, 7, 6)))
    g = torch.ones(layer(x).shape, dtype=torch.float64)
    expected = reference(layer, config, x, g)
    for label, a, b in zip(("output", "input", "weight", "bias"), run(layer, x, g), expected):
        assert close(a, b), label


@pytest.mark.parametrize("factory, easy, revealing, rows", [
    # Reference: torch conv2d autograd. Symmetric padding hides the high-side crop; "same" with a
    # 2x2 kernel pads 0 on top and 1 at the bottom, so the input gradient shifts by one row and column.
    (demo.TileConv, "plain-3x3", "same-even-kernel", None),
    # Stride 1 hides the short crop. On a 7x8 input with a 3x3 kernel, stride 2 and padding 1, the
    # 7 + 1 + 1 - 3 = 6 rows of room fit the stride evenly, the 7 columns of room leave one over:
    # the last input column, which the last window does reach, loses its gradient.
    (demo.DepthwiseConv, "same-even-kernel", "depthwise-strided-uneven", (slice(None), slice(-1, None))),
], ids=["tile-conv-high-side-crop", "depthwise-short-crop"])
def test_slipped_layers_agree_on_easy_configs_and_fail_on_revealing_ones(factory, easy, revealing, rows):
    slipped = lambda **c: factory(**c, slipped=True)  # noqa: E731
    ours, theirs = case(slipped, easy)
    assert all(close(a, b) for a, b in zip(ours, theirs))
    ours, theirs = case(slipped, revealing)
    assert close(ours[0], theirs[0]) and close(ours[2], theirs[2]) and close(ours[3], theirs[3])
    assert not close(ours[1], theirs[1])  # only the input gradient is wrong
    if rows is not None:
        wrong = ~np.isclose(ours[1].numpy(), theirs[1].numpy(), rtol=1e-12, atol=1e-12)
        assert wrong[(..., *rows)].all() and not np.delete(wrong, -1, axis=-1).any()
        assert (ours[1][(..., *rows)] == 0).all()


@pytest.mark.parametrize("name, size", [
    ("depthwise-strided-uneven", (7, 7)),  # an even fit in both dims
    ("dilated-strided-uneven", SIZE),  # stride 2 and dilation 2 never reach the odd column left over
], ids=["even-fit", "unreached-leftover"])
def test_depthwise_slip_stays_hidden_where_no_window_reaches_the_cut(name, size):
    # Reference: torch conv2d autograd.
    slipped = lambda **c: demo.DepthwiseConv(**c, slipped=True)  # noqa: E731
    ours, theirs = case(slipped, name, size=size)
    assert all(close(a, b) for a, b in zip(ours, theirs))


def test_denoiser_matches_the_same_network_from_torch_layers():
    # Reference: the residual block y = x + F(x) rebuilt from torch.nn.Conv2d layers with the same
    # weights (float64 autograd); its input gradient is g + J_F^T g (common practice).
    model = demo.denoiser().double()
    twin = torch.nn.ModuleDict({
        "lift": torch.nn.Conv2d(1, 8, 3, padding="same"),
        "mix": torch.nn.Conv2d(8, 8, 3, padding=2, dilation=2, groups=8),
        "merge": torch.nn.Conv2d(8, 1, 4, padding="same")}).double()
    twin.load_state_dict(model.state_dict())
    act = lambda t: torch.nn.functional.leaky_relu(t, 0.1)  # noqa: E731
    x = torch.tensor(demo.synthetic_tiles(2, 12, seed=3))
    g = torch.tensor(np.random.default_rng(4).standard_normal(x.shape))
    ours = forward_backward(model, x, g)
    xt = x.clone().requires_grad_(True)
    out = xt + twin["merge"](act(twin["mix"](act(twin["lift"](xt)))))
    out.backward(g)
    assert close(ours[0], out.detach()) and close(ours[1], xt.grad)
    slipped = demo.denoiser_slipped().double()
    out_slipped, grad_slipped = forward_backward(slipped, x, g)
    assert close(out_slipped, out.detach()) and not close(grad_slipped, xt.grad)


def test_denoiser_is_the_identity_when_its_last_layer_is_zero():
    # A residual block computes y = x + F(x) (common practice): F = 0 gives y = x exactly.
    model = demo.TileDenoiser().double()
    with torch.no_grad():
        model.merge.weight.zero_()
        model.merge.bias.zero_()
    tiles = demo.synthetic_tiles(2, 12, seed=5)
    np.testing.assert_array_equal(model(torch.tensor(tiles)).detach().numpy(), tiles)


def test_factories_are_importable_by_name_and_name_their_parameters_like_the_oracle():
    module = importlib.import_module("refops.examples.denoiser")
    for name in ("tile_conv", "tile_conv_slipped", "depthwise_conv", "depthwise_conv_slipped"):
        layer = getattr(module, name)(**conv(2, 4, 3, groups=2, bias=True))
        assert isinstance(layer, torch.nn.Module)
        assert {n: tuple(p.shape) for n, p in layer.named_parameters()} == {"weight": (4, 1, 3, 3), "bias": (4,)}
    assert isinstance(module.denoiser(), torch.nn.Module)


def test_seeded_weights_and_tiles_are_reproducible():
    a, b = demo.denoiser(), demo.denoiser()
    assert all(torch.equal(p, q) for p, q in zip(a.parameters(), b.parameters()))
    np.testing.assert_array_equal(demo.synthetic_tiles(3, 10, seed=7), demo.synthetic_tiles(3, 10, seed=7))


def test_tiles_are_blobs_plus_noise_of_the_stated_size():
    clean = demo.synthetic_tiles(4, 32, noise=0.0, seed=2)
    noisy = demo.synthetic_tiles(4, 32, noise=0.1, seed=2)
    assert clean.shape == noisy.shape == (4, 1, 32, 32) and clean.dtype == np.float64
    assert clean.min() >= 0 and 0.9 <= clean.reshape(4, -1).max(axis=1).min() <= 3.0  # blob peaks are 1
    # 4096 standard-normal draws: the sample deviation is within 5 % of 0.1 (common practice: ~1/sqrt(2n)).
    assert abs((noisy - clean).std() - 0.1) < 0.005


@pytest.mark.parametrize("call, message", [
    (lambda: demo.tile_conv(**conv(3, 4, 3, groups=2)), r"groups=2: must divide in_channels=3"),
    (lambda: demo.tile_conv(**conv(2, 3, 3, groups=2)), r"groups=2: must divide out_channels=3"),
    (lambda: demo.tile_conv(**conv(2, 2, 0)), r"kernel_size=0: every entry must be >= 1"),
    (lambda: demo.tile_conv(**conv(2, 2, 3, stride=2, padding="same")), r"padding='same': 'same' needs stride=1"),
    (lambda: demo.tile_conv(**conv(2, 2, 3, padding="full")), r"padding='full': expected an int"),
    (lambda: demo.tile_conv(**conv(2, 2, 3, padding_mode="mirror")), r"padding_mode='mirror': expected one of"),
    (lambda: demo.depthwise_conv(**conv(4, 4, 3, groups=2)),
     r"groups=2: a depthwise layer needs groups == in_channels=4"),
    (lambda: demo.synthetic_tiles(0), r"count=0: must be >= 1"),
    (lambda: demo.synthetic_tiles(2, noise=-1.0), r"noise=-1.0: must be >= 0"),
], ids=["groups-in", "groups-out", "kernel", "same-strided", "padding-word", "padding-mode", "depthwise-groups",
        "tile-count", "negative-noise"])
def test_bad_arguments_name_the_argument(call, message):
    with pytest.raises(ValueError, match=message):
        call()


@pytest.mark.parametrize("factory", [demo.TileConv, demo.DepthwiseConv], ids=["tile-conv", "depthwise"])
def test_bfloat16_outputs_are_rounded_once_from_a_float32_sum(factory):
    # Reference: torch.nn.functional.conv2d in float64 on the same bfloat16 values. Summing in
    # float32 and rounding once keeps |error| <= u |ref| + gamma_k u32 M, with u = 2**-8 for
    # bfloat16 (8 significand bits), u32 = 2**-24 and M = conv(|x|, |w|) + |b| (Higham 2002, ch. 3).
    config = conv(4, 4, 3, padding=1, groups=4)
    layer = factory(**config, generator=torch.Generator().manual_seed(2)).to(torch.bfloat16)
    x = torch.tensor(np.random.default_rng(2).standard_normal((2, 4, 9, 9)), dtype=torch.bfloat16)
    out = layer(x).double()
    w, b, x64 = layer.weight.double(), layer.bias.double(), x.double()
    ref = torch.nn.functional.conv2d(x64, w, b, padding=1, groups=4)
    magnitude = torch.nn.functional.conv2d(x64.abs(), w.abs(), b.abs(), padding=1, groups=4)
    k = 10  # nine taps and the bias
    bound = 2.0 ** -8 * ref.abs() + k * 2.0 ** -24 / (1 - k * 2.0 ** -24) * magnitude
    assert ((out - ref).abs() <= bound).all()
