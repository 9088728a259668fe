"""Blocks whose DATE-OBS contradicts their place in the night's sequence.

A block's place in the night comes from its DATE-OBS.  A clock glitch that
sets a block's DATE-OBS backwards (or forwards) would put its rows at the
wrong place, where they overlap a good block and the overlap message names
the good neighbour.  The block sequence (BLOCKSEQ, then the file name) is a
second witness of the order: the longest sequence of blocks, in that order,
whose DATE-OBS never decreases is taken as right.  A block outside it whose
rows would collide in time with a block of that sequence is out of order:
it is left out and named.  A block outside it that collides with nothing (a
camera that restarted its numbering, say) keeps its place by DATE-OBS.
"""

from __future__ import annotations

import bisect
from collections.abc import Sequence

from pipeline.stages.ingest._header import BlockInfo

__all__ = ["find_out_of_order"]


def _longest_non_decreasing(values: Sequence[float]) -> list[bool]:
    """Which items form a longest non-decreasing subsequence.

    Among equally long subsequences, the one that keeps earlier items is
    chosen (so a block that goes backwards is left out rather than the block
    before it): patience sorting run from the end on the negated values.
    """
    n = len(values)
    reverse = [-v for v in reversed(values)]
    tails: list[float] = []
    tail_items: list[int] = []
    parent = [-1] * n
    for item, value in enumerate(reverse):
        place = bisect.bisect_right(tails, value)
        if place == len(tails):
            tails.append(value)
            tail_items.append(item)
        else:
            tails[place] = value
            tail_items[place] = item
        parent[item] = tail_items[place - 1] if place else -1
    keep = [False] * n
    item = tail_items[-1] if tail_items else -1
    while item >= 0:
        keep[n - 1 - item] = True
        item = parent[item]
    return keep


def find_out_of_order(
    infos: Sequence[BlockInfo], tolerance_rows: float = 0.5
) -> tuple[list[BlockInfo], list[str]]:
    """Leave out blocks whose DATE-OBS is out of sequence and collides with others.

    Parameters
    ----------
    infos : sequence of BlockInfo
    tolerance_rows : float
        Overlap in rows (of the earlier block's LINETIME) still not counted
        as a collision (clock jitter).

    Returns
    -------
    kept : list of BlockInfo
        The other blocks, in sequence order.
    rejected : list of str
        One line per block left out, naming it, its DATE-OBS and the block
        it contradicts.
    """
    ordered = sorted(infos, key=lambda b: (b.block_seq, b.name))
    if not ordered:
        return [], []
    first = ordered[0].date_obs
    starts = [float((b.date_obs - first).sec) for b in ordered]
    stops = [t + b.n_rows * b.line_time for t, b in zip(starts, ordered, strict=True)]
    in_sequence = _longest_non_decreasing(starts)
    keep = list(in_sequence)
    rejected = []
    for position, block in enumerate(ordered):
        if in_sequence[position]:
            continue
        collides = any(
            in_sequence[k]
            and starts[position] < stops[k] - tolerance_rows * ordered[k].line_time
            and starts[k] < stops[position] - tolerance_rows * block.line_time
            for k in range(len(ordered))
        )
        if not collides:
            keep[position] = True
            continue
        before = next((ordered[k] for k in range(position - 1, -1, -1) if in_sequence[k]), None)
        after = next(
            (ordered[k] for k in range(position + 1, len(ordered)) if in_sequence[k]), None
        )
        if before is not None and block.date_obs < before.date_obs:
            what = f"goes backwards: earlier than {before.name} (BLOCKSEQ {before.block_seq})"
        else:
            what = f"jumps ahead: later than {after.name} (BLOCKSEQ {after.block_seq})"
        rejected.append(
            f"{block.name}: DATE-OBS {block.date_obs.isot} (BLOCKSEQ {block.block_seq}) "
            f"{what}; left out, its rows would land at the wrong place (fix its DATE-OBS "
            "or BLOCKSEQ)."
        )
    return [b for b, k in zip(ordered, keep, strict=True) if k], rejected
