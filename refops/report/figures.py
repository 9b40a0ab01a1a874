"""Pictures for the reports, drawn headless with matplotlib and returned as PNG bytes.

Colours: the perceptually uniform, colour-vision-deficiency friendly ``cividis`` map for
heatmaps, and a palette from the Okabe-Ito set for lines and bars.
"""
from __future__ import annotations

import io

import numpy as np

BLUE, ORANGE, VERMILLION, GREY = "#0072B2", "#E69F00", "#D55E00", "#666666"


def _pyplot():
    import matplotlib
    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt
    return plt


def _png(fig) -> bytes:
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=90, bbox_inches="tight")
    _pyplot().close(fig)
    return buffer.getvalue()


def worst_planes(share: np.ndarray, count: int = 4) -> list[tuple[tuple[int, ...], np.ndarray]]:
    """The 2-d spatial planes of ``share`` with the largest maximum, as ``(leading index, plane)``.

    ``(N, C, H, W)`` gives planes per (sample, channel); 1-d data becomes a single row; 0-d none.
    """
    share = np.where(np.isfinite(share), share, np.nanmax(np.where(np.isfinite(share), share, 0)) * 2 + 1)
    if share.ndim == 0:
        return []
    if share.ndim == 1:
        return [((), share[None, :])]
    lead = share.shape[:-2]
    planes = share.reshape((-1,) + share.shape[-2:])
    order = np.argsort(-planes.max(axis=(1, 2)), kind="stable")[:count]
    return [(tuple(int(i) for i in np.unravel_index(k, lead)) if lead else (), planes[k]) for k in order]


def share_heatmaps(share: np.ndarray, tensor: str) -> bytes | None:
    """Heatmaps of error / allowed over the spatial dims for the worst planes (1 = the bound)."""
    planes = worst_planes(share)
    if not planes:
        return None
    plt = _pyplot()
    fig, axes = plt.subplots(1, len(planes), figsize=(3.2 * len(planes), 3.0), squeeze=False)
    top = max(1.0, max(float(p.max()) for _, p in planes))
    for ax, (index, plane) in zip(axes[0], planes):
        image = ax.imshow(plane, cmap="cividis", vmin=0.0, vmax=top, interpolation="nearest")
        over = np.argwhere(plane > 1)
        if len(over):
            ax.scatter(over[:, 1], over[:, 0], marker="x", color=VERMILLION, s=18, label="over the bound")
        ax.set_title(f"{tensor}[{', '.join(map(str, index))}]" if index else tensor, fontsize=9)
        ax.set_xlabel("column")
    axes[0][0].set_ylabel("row")
    fig.colorbar(image, ax=axes[0].tolist(), shrink=0.8, label="error / allowed")
    return _png(fig)


def share_histogram(share: np.ndarray, tensor: str) -> bytes:
    """Histogram of log10(error / allowed) over all elements, with the bound marked at 0."""
    plt = _pyplot()
    values = share[np.isfinite(share)].ravel()
    values = np.log10(np.maximum(values, 1e-12))
    fig, ax = plt.subplots(figsize=(4.8, 2.8))
    ax.hist(values, bins=40, color=BLUE)
    ax.axvline(0.0, color=VERMILLION, linestyle="--", label="the bound")
    ax.set_xlabel("log10(error / allowed)")
    ax.set_ylabel("elements")
    ax.set_title(f"{tensor}: error against the bound", fontsize=9)
    ax.legend(fontsize=8)
    return _png(fig)


def bound_usage_chart(usage: dict[str, list[float]]) -> bytes | None:
    """Per tensor, the share of the bound each passing case used at its worst element."""
    usage = {k: v for k, v in usage.items() if v}
    if not usage:
        return None
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(5.5, 0.6 + 0.5 * len(usage)))
    for row, (tensor, values) in enumerate(usage.items()):
        jitter = np.random.default_rng(row).uniform(-0.15, 0.15, len(values))
        ax.scatter(values, row + jitter, s=10, color=BLUE, alpha=0.7)
    ax.axvline(1.0, color=VERMILLION, linestyle="--")
    ax.set_yticks(range(len(usage)), list(usage))
    ax.set_xlim(0, max(1.05, max(max(v) for v in usage.values()) * 1.05))
    ax.set_xlabel("share of the bound used (max over elements, one dot per case)")
    return _png(fig)
