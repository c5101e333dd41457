"""The shape arithmetic of convolution blocks, pure Python (neither jax nor pydantic): the spec's
checks (``compiler.spec.ConvModel.problems``), the network (``compiler.model.conv``) and its cost
(``compiler.model.conv_cost``) all read it here, so they cannot disagree about what fits.

Contract: a block is anything with ``channels``, ``kernel``, ``stride``, ``padding`` (``"same"``
or ``"valid"``) and ``pool`` (the spec's ``ConvBlock``); a shape is one example's, channels last.

- :func:`padding` ``(kernel, padding) -> (before, after)`` zeros along one axis;
- :func:`convolved` ``(n, block)``: positions along one axis after the block's convolution,
  before its pooling (what the convolution computes and the backward pass keeps);
- :func:`misfit` ``(in_shape, blocks) -> (index, message) | None``: why the blocks cannot take
  examples of ``in_shape`` (index None: no convolution takes that shape; else the first block
  that leaves no position), None when they fit;
- :func:`feature_shapes` ``(in_shape, blocks)``: the shape after each block, for blocks that fit.
"""

from __future__ import annotations

__all__ = ["padding", "convolved", "misfit", "feature_shapes"]


def padding(kernel: int, padding: str) -> tuple[int, int]:
    # "same": the output of stride 1 keeps the input's size; an even window's extra zero goes
    # before, as scipy.signal.correlate's mode="same" centres it.
    return (kernel // 2, (kernel - 1) // 2) if padding == "same" else (0, 0)


def convolved(n: int, block) -> int:
    """Positions along one axis after ``block``'s convolution, before its pooling: a window
    ``k``, stride ``s`` and padding ``(lo, hi)`` give ``⌊(n + lo + hi − k)/s⌋ + 1``; 0 when the
    window does not fit."""
    lo, hi = padding(block.kernel, block.padding)
    return (n + lo + hi - block.kernel) // block.stride + 1 if n + lo + hi >= block.kernel else 0


def _positions(n: int, block) -> int:
    """Positions along one axis after ``block``: its convolution, then pooling of window ``p``
    (stride ``p``, no padding) ``⌊·/p⌋``."""
    return convolved(n, block) // block.pool


def misfit(in_shape, blocks) -> tuple[int | None, str] | None:
    shape = tuple(in_shape)
    if len(shape) not in (2, 3):
        return None, (f"needs examples of shape [length, channels] or [height, width, channels], "
                      f"not {list(shape)}")
    for i, block in enumerate(blocks):
        spatial = [_positions(n, block) for n in shape[:-1]]
        if min(spatial) < 1:
            same = ', padding = "same"' if block.padding == "valid" else ""
            return i, (f"a block of kernel {block.kernel}, stride {block.stride}, pool {block.pool} and padding "
                       f"{block.padding!r} leaves no position of the {list(shape[:-1])} it receives; use fewer "
                       f"blocks{same} or a smaller kernel, stride or pool")
        shape = (*spatial, block.channels)
    return None


def feature_shapes(in_shape, blocks) -> list[tuple[int, ...]]:
    out, shape = [], tuple(in_shape)
    for block in blocks:
        shape = (*(_positions(n, block) for n in shape[:-1]), block.channels)
        out.append(shape)
    return out
