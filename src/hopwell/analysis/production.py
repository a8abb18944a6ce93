"""One pass over a run store: the production series and the acceptance counts a report needs.

The store is read chunk by chunk; only dihedrals, energies and bookkeeping are kept in memory
(never all positions). A chunk that does not load (cut short, zeroed, holding pickles) is
skipped and named in ``Production.damaged_chunks``; every intact chunk is read. A walker's
series then runs on across the gap, which a lost chunk leaves in every walker alike.
"""

from __future__ import annotations

import json
from dataclasses import dataclass

import mdtraj as md
import numpy as np

from hopwell.analysis import states as st
from hopwell.errors import InputError
from hopwell.sampling.checkpoint import newest_readable
from hopwell.sampling.shards import shard_stores
from hopwell.sampling.store import MOVE_FLOW, RunStore

ACCEPTANCE_WINDOWS = 50  # cycle windows over the whole run in the acceptance-over-time table


@dataclass
class CycleCounts:
    """Flow-move counts per cycle over the whole run, training included; index = cycle.

    The store records, per flow block (one walker, one cycle), whether any proposal was
    accepted, and in production every proposal; one-torsion moves and seed darts are not
    recorded per cycle.
    """

    blocks: np.ndarray  # (n_cycles,) flow blocks recorded
    blocks_accepted: np.ndarray  # (n_cycles,) blocks with at least one accepted proposal
    proposals: np.ndarray  # (n_cycles,) recorded proposals (production only)
    proposals_accepted: np.ndarray  # (n_cycles,)
    production: np.ndarray  # (n_cycles,) bool, the cycle's records are production


@dataclass
class Production:
    """What the report needs from the store, gathered in one pass over the chunks."""

    dihedrals_rad: np.ndarray  # (n, n_torsions)
    energy_kj: np.ndarray
    walker: np.ndarray
    order: np.ndarray  # (cycle * 2 + move): time order within a walker
    proposal_dihedrals_rad: np.ndarray  # (m, n_torsions), frozen-flow proposals
    proposal_log_weight: np.ndarray  # (m,) -u - log q; -inf where a guard rejected
    proposal_block: np.ndarray  # (m,) one block per (walker, cycle)
    flow_accepted: int
    acceptance: CycleCounts  # flow acceptance per cycle, training and production
    damaged_chunks: list  # a DamagedFile (path, reason) for each chunk that did not load and was skipped
    training_dihedrals_rad: np.ndarray  # (n_training, n_torsions): the training phase's chain states


def _per_cycle(cycles: np.ndarray, flags: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Distinct cycles, records and flagged records per cycle of one chunk, each ``(n_distinct,)``."""
    distinct, index = np.unique(cycles, return_inverse=True)
    return (distinct, np.bincount(index, minlength=len(distinct)),
            np.bincount(index, weights=flags.astype(float), minlength=len(distinct)).astype(np.int64))


def _cycle_counts(n_cycles: int, block_parts: list, proposal_parts: list,
                  production_cycles: list) -> CycleCounts:
    """Sum the per-chunk :func:`_per_cycle` tallies into arrays of shape ``(n_cycles,)``."""
    def total(parts, column):
        out = np.zeros(n_cycles, dtype=np.int64)
        for part in parts:
            np.add.at(out, part[0], part[column])
        return out

    production = np.zeros(n_cycles, dtype=bool)
    for cycles in production_cycles:
        production[cycles] = True
    return CycleCounts(total(block_parts, 1), total(block_parts, 2), total(proposal_parts, 1),
                       total(proposal_parts, 2), production)


def gather(store: RunStore, topology: md.Topology, torsions, kT: float) -> Production:
    """Production dihedrals, energies and proposal weights of a run, and its acceptance counts."""
    parts = {k: [] for k in ("d", "e", "w", "o", "pd", "pw", "pb", "td")}
    accepted = 0
    block_tallies, proposal_tallies, production_cycles = [], [], []
    n_cycles = 0
    damaged = []
    for chunk in store.iter_chunks(damaged=damaged):
        keep = chunk["state_production"].astype(bool)
        n_cycles = max(n_cycles, 1 + int(chunk["state_cycle"].max(initial=-1)))
        flow = chunk["state_move"] == MOVE_FLOW
        block_tallies.append(_per_cycle(chunk["state_cycle"][flow], chunk["state_accepted"][flow]))
        production_cycles.append(np.unique(chunk["state_cycle"][keep]))
        if not keep.all():
            parts["td"].append(st.dihedrals(chunk["state_positions_nm"][~keep], topology, torsions))
        if keep.any():
            parts["d"].append(st.dihedrals(chunk["state_positions_nm"][keep], topology, torsions))
            parts["e"].append(chunk["state_energy_kj"][keep])
            parts["w"].append(chunk["state_walker"][keep])
            parts["o"].append(chunk["state_cycle"][keep] * 2 + chunk["state_move"][keep])
        if "proposal_accepted" in chunk:
            accepted += int(chunk["proposal_accepted"].sum())
            energy = chunk["proposal_energy_kj"]
            ok = (chunk["proposal_rejected_by"] == 0) & np.isfinite(energy)
            parts["pd"].append(st.dihedrals(chunk["proposal_positions_nm"], topology, torsions))
            parts["pw"].append(np.where(ok, -np.where(ok, energy, 0.0) / kT - chunk["proposal_log_q"], -np.inf))
            parts["pb"].append(chunk["proposal_cycle"] * 1_000_000 + chunk["proposal_walker"])
            proposal_tallies.append(_per_cycle(chunk["proposal_cycle"], chunk["proposal_accepted"]))
    if not parts["e"]:
        lost = f" ({len(damaged)} damaged chunk(s) skipped)" if damaged else ""
        raise InputError(f"{store.path}: no production samples yet{lost}; let the run go on or resume it")
    if not parts["pd"]:
        parts["pd"], parts["pw"], parts["pb"] = [np.zeros((0, len(torsions)))], [np.zeros(0)], [np.zeros(0, int)]
    return Production(*(np.concatenate(parts[k]) for k in ("d", "e", "w", "o", "pd", "pw", "pb")), accepted,
                      _cycle_counts(n_cycles, block_tallies, proposal_tallies, production_cycles), damaged,
                      _stacked(parts["td"], len(torsions)))


def _stacked(parts: list, n_torsions: int) -> np.ndarray:
    """Dihedral arrays stacked, ``(n, n_torsions)`` (empty when there are none)."""
    return np.concatenate(parts) if parts else np.zeros((0, n_torsions))


def _fraction(numerator: int, denominator: int) -> float | None:
    return numerator / denominator if denominator else None


def acceptance_over_time(counts: CycleCounts, n_windows: int = ACCEPTANCE_WINDOWS) -> list[dict]:
    """Flow acceptance in windows of cycles, training and production apart.

    Parameters
    ----------
    counts : CycleCounts
    n_windows : int
        About this many windows of equal width span the run; a window never straddles the
        end of training, so each phase's last window may be shorter.

    Returns
    -------
    list of dict
        One per window with flow blocks, in cycle order: ``cycle_start`` (first cycle),
        ``cycle_end`` (one past the last), ``phase`` ("training" or "production"),
        ``flow_blocks``, ``flow_block_acceptance`` (fraction of blocks with an accepted
        proposal), ``flow_proposals`` and ``flow_proposal_acceptance`` (fraction of proposals
        accepted; None where proposals are not recorded, as in training).
    """
    n_cycles = len(counts.blocks)
    width = max(1, -(-n_cycles // n_windows))
    boundaries = np.flatnonzero(np.diff(counts.production.astype(int))) + 1
    windows = []
    for first, stop in zip(np.r_[0, boundaries], np.r_[boundaries, n_cycles]):
        for start in range(int(first), int(stop), width):
            end = min(start + width, int(stop))
            blocks = int(counts.blocks[start:end].sum())
            if not blocks:
                continue
            proposals = int(counts.proposals[start:end].sum())
            windows.append({
                "cycle_start": start, "cycle_end": end,
                "phase": "production" if counts.production[start] else "training",
                "flow_blocks": blocks,
                "flow_block_acceptance": int(counts.blocks_accepted[start:end].sum()) / blocks,
                "flow_proposals": proposals,
                "flow_proposal_acceptance": _fraction(int(counts.proposals_accepted[start:end].sum()), proposals),
            })
    return windows


def walker_series(values: np.ndarray, production: Production) -> np.ndarray:
    """Per-walker time series, shape ``(n_walkers, n_per_walker)`` (walkers truncated to equal)."""
    walkers = np.unique(production.walker)
    rows = []
    for w in walkers:
        mask = production.walker == w
        rows.append(values[mask][np.argsort(production.order[mask], kind="stable")])
    n = min(len(r) for r in rows)
    return np.stack([r[:n] for r in rows])


MOVE_COUNTERS = {"training": "flow_training", "production": "flow_production", "single": "one_torsion",
                 "pair": "torsion_pair", "ring": "ring_flip", "dart": "dart"}  # checkpoint key: report label


def readable_state(store: RunStore) -> dict | None:
    """The checkpoint a report reads counters from: the newest whose arrays load (:func:`newest_readable`).

    None before the first checkpoint, and when neither checkpoint loads (the report then goes
    without the checkpoint's counters; :func:`checkpoint_warnings` says so).
    """
    return newest_readable(store.path)[0]


def checkpoint_warnings(store: RunStore) -> list[str]:
    """One line for each damaged checkpoint of a run and its shards, saying what the report read instead."""
    lines = []
    for run in [store] + [shard for shard, _ in shard_stores(store.path)]:
        state, passed_over = newest_readable(run.path)
        if passed_over:
            lines.append("; ".join(passed_over) + ("; the report reads the previous checkpoint's counters"
                                                   if state is not None else
                                                   ": the report has no move counters from a checkpoint"))
    return lines


def _saved_counters(store: RunStore) -> dict:
    """The checkpoint's ``stats`` JSON (every move's counters); empty before the first checkpoint."""
    state = readable_state(store)
    return json.loads(str(state["stats"])) if state is not None else {}


def _tallies(saved: dict) -> dict[str, np.ndarray]:
    """``(accepted, proposed)`` of each move in :data:`MOVE_COUNTERS` (zeros where a move never ran)."""
    return {key: np.array([int(saved.get(key, {}).get("accepted", 0)), int(saved.get(key, {}).get("proposed", 0))])
            for key in MOVE_COUNTERS}


def _rates(tallies: dict[str, np.ndarray]) -> dict:
    return {label: (int(tallies[key][0]) / int(tallies[key][1]) if tallies[key][1] else None)
            for key, label in MOVE_COUNTERS.items()}


def move_acceptance(store: RunStore) -> dict:
    """Whole-run acceptance by move type, from the checkpoints' counters (None where unused).

    A sharded run's acceptance is pooled over its shards: accepted over proposed, summed over
    the training run and what each shard added to the counters it started from (a shard
    starts from the training run's checkpoint). A sharded run also gets ``per_shard``: each
    shard's own acceptance, in shard order, as the report's ``per_shard_populations``.
    """
    saved = _saved_counters(store)
    own = _tallies(saved)
    added = [{key: value - own[key] for key, value in _tallies(_saved_counters(shard)).items()}
             for shard, _ in shard_stores(store.path)]
    out = _rates({key: own[key] + sum(part[key] for part in added) for key in MOVE_COUNTERS})
    exchange = saved.get("exchange")
    if exchange:  # replica exchange: per neighbour pair of the ladder
        out["exchange"] = sum(exchange["accepted"]) / max(1, sum(exchange["attempted"]))
        out["exchange_per_pair"] = [a / t if t else None for a, t in zip(exchange["accepted"], exchange["attempted"])]
        out["ladder_K"] = exchange["temperatures_K"]
    if added:
        out["per_shard"] = [_rates(part) for part in added]
    return out


def _add_counts(parts: list[CycleCounts]) -> CycleCounts:
    """Cycle-by-cycle sums of several runs' counts (the shards and the training run)."""
    n = max(len(p.blocks) for p in parts)

    def total(name, dtype):
        out = np.zeros(n, dtype=dtype)
        for p in parts:
            values = getattr(p, name)
            out[:len(values)] = out[:len(values)] + values if dtype is not bool else out[:len(values)] | values
        return out

    return CycleCounts(*(total(name, np.int64) for name in ("blocks", "blocks_accepted", "proposals",
                                                            "proposals_accepted")), total("production", bool))


def _training(store: RunStore, topology: md.Topology, torsions, damaged: list) -> tuple[CycleCounts, np.ndarray]:
    """Flow-block counts per cycle of a run's own chunks (a sharded run's training), and the
    dihedrals of their chain states.

    A DamagedFile for each chunk that does not load is appended to ``damaged``.
    """
    tallies, n_cycles, dihedrals = [], 0, []
    for chunk in store.iter_chunks(damaged=damaged):
        flow = chunk["state_move"] == MOVE_FLOW
        n_cycles = max(n_cycles, 1 + int(chunk["state_cycle"].max(initial=-1)))
        tallies.append(_per_cycle(chunk["state_cycle"][flow], chunk["state_accepted"][flow]))
        dihedrals.append(st.dihedrals(chunk["state_positions_nm"], topology, torsions))
    return _cycle_counts(n_cycles, tallies, [], []), _stacked(dihedrals, len(torsions))


def gather_run(store: RunStore, topology: md.Topology, torsions, kT: float) -> Production:
    """:func:`gather`, pooled over the shards of a sharded run (:mod:`hopwell.sampling.shards`).

    Walkers are numbered over all shards (a shard's first walker is its offset), so each
    walker keeps its own time series and its own autocorrelation; the acceptance counts add the
    training run's cycles to the shards'.
    """
    shards = shard_stores(store.path)
    if not shards:
        return gather(store, topology, torsions, kT)
    parts = [(gather(shard, topology, torsions, kT), first) for shard, first in shards]
    arrays = {
        "dihedrals_rad": np.concatenate([p.dihedrals_rad for p, _ in parts]),
        "energy_kj": np.concatenate([p.energy_kj for p, _ in parts]),
        "walker": np.concatenate([p.walker + first for p, first in parts]),
        "order": np.concatenate([p.order for p, _ in parts]),
        "proposal_dihedrals_rad": np.concatenate([p.proposal_dihedrals_rad for p, _ in parts]),
        "proposal_log_weight": np.concatenate([p.proposal_log_weight for p, _ in parts]),
        "proposal_block": np.concatenate([p.proposal_block + first for p, first in parts]),  # cycle * 1e6 + walker
    }
    damaged = []
    training, training_dihedrals = _training(store, topology, torsions, damaged)
    return Production(**arrays, flow_accepted=sum(p.flow_accepted for p, _ in parts),
                      acceptance=_add_counts([training] + [p.acceptance for p, _ in parts]),
                      damaged_chunks=damaged + [path for p, _ in parts for path in p.damaged_chunks],
                      training_dihedrals_rad=training_dihedrals)
