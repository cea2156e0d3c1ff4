"""Pictures of where the answer position looks, for a few fixed retrieval items.

The items are the first ``n_images`` retrieval items of the longest context length with at least
two needles (a fixed choice, so every run draws the same items). For each, one panel per layer
(the last ``layers`` layers) shows the attention row of the position that predicts the first answer
token over the context keys: each head as a thin line and the head mean as a thick line. The
asked needle's span is shaded green and the distractor spans red. For differential attention the
row is the difference map, so values can dip below zero.

Images come back as ``uint8 [height, width, 3]`` arrays (matplotlib, Agg backend), keyed
``retrieval_attention/item<k>``.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
from torch import nn

from .common import attention_modules, capture_attention_inputs, evaluating, padded_inputs


def picture_items(items: Sequence[dict], n_images: int) -> list[dict]:
    if not isinstance(n_images, int) or isinstance(n_images, bool) or n_images < 1:
        raise ValueError(f"probes.n_images={n_images!r}: must be a positive integer")
    candidates = [it for it in items if int(it["meta"]["n_needles"]) >= 2]
    if not candidates:
        raise ValueError("pictures: no retrieval item has n_needles >= 2")
    longest = max(int(it["meta"]["context_len"]) for it in candidates)
    return [it for it in candidates if int(it["meta"]["context_len"]) == longest][:n_images]


def head_rows(model: nn.Module, item: dict, layers: int, device) -> tuple[list[int], list[np.ndarray]]:
    """Layer indices and, per layer, the ``[heads, q + 1]`` attention rows at the query position."""
    modules = attention_modules(model)
    if not isinstance(layers, int) or isinstance(layers, bool) or layers < 1:
        raise ValueError(f"probes.image_layers={layers!r}: must be a positive integer")
    chosen = list(range(max(0, len(modules) - layers), len(modules)))
    q = int(item["answer_spans"][0][0]) - 1
    with evaluating(model), capture_attention_inputs(model) as inputs:
        ids, _ = padded_inputs([item], [0], device)
        model(ids)
        rows = [
            modules[i].attention_weights(inputs[i])[0, :, q, : q + 1].double().cpu().numpy() for i in chosen
        ]
    return chosen, rows


def draw(item: dict, layer_ids: Sequence[int], rows: Sequence[np.ndarray], title: str) -> np.ndarray:
    import matplotlib  # here, not at the top: only runs that draw pictures pay for matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(8, 1.8 * len(rows) + 0.6), dpi=80)
    canvas = FigureCanvasAgg(fig)
    axes = fig.subplots(len(rows), 1, squeeze=False)[:, 0]
    keys = np.arange(rows[0].shape[1])
    for ax, layer, row in zip(axes, layer_ids, rows):
        for s, e in item["asked_spans"][:1]:
            ax.axvspan(s - 0.5, e - 0.5, color="tab:green", alpha=0.3, lw=0)
        for s, e in item.get("distractor_spans", []):
            ax.axvspan(s - 0.5, e - 0.5, color="tab:red", alpha=0.25, lw=0)
        for h in range(row.shape[0]):
            ax.plot(keys, row[h], lw=0.6, alpha=0.5)
        ax.plot(keys, row.mean(axis=0), lw=1.6, color="black")
        ax.axhline(0.0, lw=0.5, color="grey")
        ax.set_xlim(-0.5, keys[-1] + 0.5)
        ax.set_ylabel(f"layer {layer}")
    axes[0].set_title(title, fontsize=9)
    axes[-1].set_xlabel("key position (green: asked needle, red: distractors; black: head mean)")
    fig.subplots_adjust(
        left=0.11,
        right=0.98,
        top=1 - 0.35 / fig.get_figheight(),
        bottom=0.45 / fig.get_figheight(),
        hspace=0.35,
    )
    canvas.draw()
    image = np.asarray(canvas.buffer_rgba())[..., :3].copy()
    return image


def attention_pictures(
    model: nn.Module, items: Sequence[dict], n_images: int = 2, layers: int = 2, device="cpu"
) -> dict[str, np.ndarray]:
    out = {}
    for k, item in enumerate(picture_items(items, n_images)):
        layer_ids, rows = head_rows(model, item, layers, device)
        m = item["meta"]
        title = (
            f"item {k}: length {m['context_len']}, depth {m['depth']:g}, {m['n_needles']} needles; "
            f"query position {int(item['answer_spans'][0][0]) - 1}"
        )
        out[f"retrieval_attention/item{k}"] = draw(item, layer_ids, rows, title)
    return out
