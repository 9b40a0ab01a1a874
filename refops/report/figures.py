"""Pictures for the reports, drawn headless (matplotlib's Agg backend) and returned as PNG bytes.

Colours are safe for colour-vision deficiencies: heatmaps use ``cividis`` (perceptually uniform,
blue to yellow) with the bound at the middle of the scale, so elements within it are blue-grey
and elements over it yellow; lines and markers use the Okabe-Ito palette, and what is over the
bound is also marked by shape (crosses, hatching), never by colour alone.
"""
from __future__ import annotations

import io

import numpy as np

BLUE, ORANGE, VERMILLION, GREY = "#0072B2", "#E69F00", "#D55E00", "#666666"
HEATMAP = "cividis"
PLANES = 4          # heatmap panels per tensor
MARKED = 400        # at most this many over-bound elements get a cross each


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


def worst_planes(share: np.ndarray, count: int = PLANES) -> list[tuple[tuple[int, ...], np.ndarray]]:
    """The 2-d planes of ``share`` (its last two dims) with the largest maxima, worst first.

    Returns ``(leading index, plane)`` pairs: ``(N, C, H, W)`` gives one plane per (sample,
    channel); a 2-d array is one plane with index ``()``; a 1-d array one row; 0-d or empty
    arrays none. ``inf`` (a non-finite mismatch) ranks above every finite share.
    """
    share = np.asarray(share, dtype=np.float64)
    if share.ndim == 0 or share.size == 0:
        return []
    if share.ndim == 1:
        return [((), share[None, :])]
    lead = share.shape[:-2]
    planes = share.reshape((-1,) + share.shape[-2:])
    order = np.argsort(-planes.max(axis=(1, 2)), kind="stable")[:count]
    return [(tuple(int(i) for i in np.unravel_index(k, lead)) if lead else (), planes[k]) for k in order]


def plane_label(tensor: str, index: tuple[int, ...], ndim: int) -> str:
    """``input[1, 2, :, :]``: which plane of a tensor a heatmap panel shows."""
    return f"{tensor}[{', '.join([*map(str, index), *[':'] * min(ndim, 2)])}]"


def _scale_top(planes) -> float:
    """The top of the colour scale: twice the bound, or the largest finite share if larger."""
    finite = [float(p[np.isfinite(p)].max()) for _, p in planes if np.isfinite(p).any()]
    return max([2.0, *finite])


def share_heatmaps(share: np.ndarray, tensor: str) -> bytes | None:
    """Heatmaps of error / allowed over the spatial dims of the worst planes (``None`` for 0-d).

    The colour scale runs from 0 through the bound (1, the middle colour) to the largest share;
    crosses mark elements over the bound, plus signs non-finite mismatches (drawn at the top).
    """
    planes = worst_planes(share)
    if not planes:
        return None
    plt = _pyplot()
    from matplotlib.colors import TwoSlopeNorm
    top = _scale_top(planes)
    norm = TwoSlopeNorm(vmin=0.0, vcenter=1.0, vmax=top)
    fig, axes = plt.subplots(1, len(planes), figsize=(3.0 * len(planes) + 1.0, 3.0), squeeze=False)
    for ax, (index, plane) in zip(axes[0], planes):
        image = ax.imshow(np.where(np.isinf(plane), top, plane), cmap=HEATMAP, norm=norm,
                          interpolation="nearest", aspect="auto" if plane.shape[0] == 1 else "equal")
        for marked, marker, label in ((np.isfinite(plane) & (plane > 1), "x", "over the bound"),
                                      (np.isinf(plane), "+", "non-finite mismatch")):
            rows, cols = np.nonzero(marked)
            if 0 < rows.size <= MARKED:
                ax.scatter(cols, rows, marker=marker, color=VERMILLION, s=16, linewidths=1.0, label=label)
        ax.set_title(plane_label(tensor, index, np.ndim(share)), fontsize=9)
        ax.set_xlabel("column", fontsize=8)
        if plane.shape[0] == 1:
            ax.set_yticks([])
    axes[0][0].set_ylabel("row", fontsize=8)
    bar = fig.colorbar(image, ax=axes[0].tolist(), shrink=0.85)
    bar.set_label("error / allowed (1 = the bound)", fontsize=8)
    bar.set_ticks([0.0, 0.5, 1.0, top])
    return _png(fig)


def share_histogram(share: np.ndarray, tensor: str) -> bytes:
    """Histogram of log10(error / allowed) over the elements, the bound marked at 0.

    Elements with no error at all and non-finite mismatches cannot sit on a log axis; their
    counts are written in the title.
    """
    plt = _pyplot()
    share = np.asarray(share, dtype=np.float64).ravel()
    positive = share[np.isfinite(share) & (share > 0)]
    exact = int(np.count_nonzero(share == 0))
    mismatched = int(np.count_nonzero(np.isinf(share)))
    decades = np.log10(positive)
    fig, ax = plt.subplots(figsize=(4.8, 2.8))
    if decades.size:
        edges = np.histogram_bin_edges(np.append(decades, 0.0), bins=40)
        ax.hist(decades[decades <= 0], bins=edges, color=BLUE, label="within the bound")
        ax.hist(decades[decades > 0], bins=edges, color=VERMILLION, hatch="//", edgecolor="white",
                label="over the bound")
    ax.axvline(0.0, color=GREY, linestyle="--", linewidth=1.0)
    ax.set_xlabel("log10(error / allowed)   (0 = the bound)", fontsize=8)
    ax.set_ylabel("elements", fontsize=8)
    ax.set_title(f"{tensor}: {positive.size} elements with an error, {exact} exact, "
                 f"{mismatched} non-finite mismatches", fontsize=8)
    if decades.size:
        ax.legend(fontsize=7)
    return _png(fig)


def bound_usage_chart(usage: dict[str, list[float]]) -> bytes | None:
    """Per tensor, the share of the bound each passing case used at its worst element (one dot each)."""
    usage = {tensor: values for tensor, values in usage.items() if values}
    if not usage:
        return None
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(6.0, 0.8 + 0.45 * len(usage)))
    for row, (tensor, values) in enumerate(usage.items()):
        jitter = np.random.default_rng(row).uniform(-0.15, 0.15, len(values))
        ax.scatter(values, row + jitter, s=12, color=BLUE, alpha=0.7, linewidths=0)
    ax.axvline(1.0, color=VERMILLION, linestyle="--", linewidth=1.0, label="the bound")
    ax.set_yticks(range(len(usage)), [f"{tensor} ({len(v)})" for tensor, v in usage.items()], fontsize=8)
    ax.set_ylim(-0.6, len(usage) - 0.4)
    ax.set_xlim(0, max(1.05, 1.05 * max(max(v) for v in usage.values())))
    ax.set_xlabel("share of the bound used (worst element of each case)", fontsize=8)
    ax.legend(fontsize=7, loc="lower right")
    return _png(fig)
