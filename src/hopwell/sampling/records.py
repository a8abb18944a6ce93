"""The records of cycles not yet written: walker states and flow proposals, queued for a chunk.

A chunk (:meth:`hopwell.sampling.store.RunStore.write_chunk`) holds the states in the order
they were queued (each cycle's walkers in turn, each walker's local state before its state after
the other moves) and the flow proposals of the same cycles.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from hopwell.sampling.store import STATE_FIELDS


@dataclass(frozen=True)
class Snapshot:
    """The walkers at one instant of a cycle: copies of their positions and energies, and the
    run's elapsed seconds then."""

    positions_nm: np.ndarray
    energies_kj: np.ndarray
    time_s: float


class ChunkQueue:
    """States and proposal blocks queued since the last chunk write."""

    def __init__(self):
        self._states = {k: [] for k in STATE_FIELDS}
        self._proposals: list[dict] = []

    def __bool__(self) -> bool:
        return bool(self._states["walker"])

    def add_state(self, snapshot: Snapshot, walker: int, cycle: int, move: int, production: bool,
                  accepted: bool = True) -> None:
        """Queue walker ``walker``'s state in ``snapshot``, recorded after move kind ``move``."""
        row = {"positions_nm": snapshot.positions_nm[walker].astype(np.float32),
               "energy_kj": snapshot.energies_kj[walker], "walker": int(walker), "cycle": cycle,
               "move": move, "accepted": accepted, "production": production, "time_s": snapshot.time_s}
        for key in STATE_FIELDS:
            self._states[key].append(row[key])

    def add_proposals(self, block: dict) -> None:
        """Queue one block of proposal records (columns of equal length)."""
        self._proposals.append(block)

    def take(self) -> tuple[dict, dict]:
        """The queued states and proposals as columns (``{}`` for none), emptying the queue."""
        states = {k: np.asarray(v) for k, v in self._states.items()}
        proposals = concat_columns(self._proposals)
        self.__init__()
        return states, proposals


def concat_columns(blocks: list[dict]) -> dict:
    """Blocks of equal-length columns joined column by column; ``{}`` for no blocks."""
    if not blocks:
        return {}
    return {k: np.concatenate([b[k] for b in blocks]) for k in blocks[0]}
