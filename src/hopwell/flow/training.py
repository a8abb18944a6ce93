"""Training the torsion flow on the walkers' own states, and the columns it covers.

:class:`FlowTrainer` owns the :class:`~hopwell.flow.torsion.TorsionFlow`, its optimizer and a
bounded buffer of recent walker states. During the training phase the scheduler adds states and
calls :meth:`FlowTrainer.fit` every few cycles; the chain is then adaptive, not Markov, so
those samples are kept for diagnostics only. From the end of training on the flow is frozen.
"""

from __future__ import annotations

import copy
import math
from collections import deque
from dataclasses import dataclass

import numpy as np
import torch
from rdkit import Chem

from hopwell.coords.internal import InternalCoords, ZMatrix, cartesian_to_internal
from hopwell.coords.torsions import (
    context_angles,
    refuse_rigid,
    rotatable_rows,
    stiff_rows,
)
from hopwell.flow.torsion import TorsionFlow

CHECK_ROWS = 512  # newest buffer rows on which a refit is judged


@dataclass
class FlowSettings:
    """What the flow covers and how it is trained.

    Attributes
    ----------
    flow_torsions : {"rotatable", "all"}
        Torsions the flow and one-torsion moves redraw: the principal torsions about rotatable
        bonds (methyl and hydroxyl rotors left to Langevin), or every moving torsion.
    flow_stiff_torsions : bool
        Let the flow also redraw torsions about amide- and ester-like bonds; by default these
        are left to the one-torsion moves and darts unless the molecule has no other
        (:mod:`hopwell.moves.flow_block` gives the measured reason).
    flow_context : bool
        Condition the flow on the bond angles at its torsions' central atoms and on the moving
        torsions it leaves out: it then models p(t | c) rather than the marginal p(t).
    context_noise : float
        Spread of the Gaussian noise added to the standardized context while fitting.
    training_cycles : int
        Most cycles of the training phase; production follows with the flow frozen.
    training_seconds : float or None
        Training also ends once this much sampling time has passed (set from ``--hours``).
    fit_every, fit_steps, fit_batch : int
        Refit the flow every ``fit_every`` cycles with ``fit_steps`` AdamW steps on minibatches.
    learning_rate, weight_decay : float
        AdamW settings (decoupled weight decay, Loshchilov and Hutter 2019).
    buffer_size : int
        Most recent walker states kept for training (bounds memory).
    flow_hidden, flow_layers, flow_bins : int
    """

    flow_torsions: str = "rotatable"
    flow_stiff_torsions: bool = False
    flow_context: bool = True
    context_noise: float = 1.0
    training_cycles: int = 200
    training_seconds: float | None = None
    fit_every: int = 4
    fit_steps: int = 40
    fit_batch: int = 256
    learning_rate: float = 2.0e-3
    weight_decay: float = 1.0e-3
    buffer_size: int = 20000
    flow_hidden: int = 32
    flow_layers: int = 6
    flow_bins: int = 8


class FlowTrainer:
    """The torsion flow, the Z-matrix columns it reads and writes, its optimizer and buffer.

    Parameters
    ----------
    zmat : ZMatrix
    mol : rdkit.Chem.Mol
    seeds_nm : numpy.ndarray, shape ``(n_seeds, n_atoms, 3)``
        Place the base's mixture components before any training.
    settings : FlowSettings
    seed : int
        The network's initial weights follow it.

    Attributes
    ----------
    moving : numpy.ndarray of int
        Torsion rows the non-local moves redraw (:func:`hopwell.coords.torsions.moving_torsions`).
    all_moving : numpy.ndarray of int
        Every moving row, rotatable or not (the darts' regions are built from these).
    flow_columns : numpy.ndarray of int
        Columns of ``moving`` the flow redraws.
    context_columns, other_rows : numpy.ndarray of int
        The flow's context: angle columns, then the moving torsion rows it leaves out (an
        amide's cis/trans state changes which positions of its neighbours clash).
    """

    def __init__(self, zmat: ZMatrix, mol: Chem.Mol, seeds_nm: np.ndarray, settings: FlowSettings, seed: int):
        if settings.flow_torsions not in ("rotatable", "all"):
            raise ValueError(f"flow_torsions must be 'rotatable' or 'all', got {settings.flow_torsions!r}")
        self.zmat, self.settings = zmat, settings
        self.all_moving = refuse_rigid(zmat, mol)
        rotatable = rotatable_rows(zmat, self.all_moving)
        self.moving = rotatable if settings.flow_torsions == "rotatable" and len(rotatable) else self.all_moving
        stiff = stiff_rows(zmat, mol, self.moving)
        self.flow_columns = (np.arange(len(self.moving)) if settings.flow_stiff_torsions or stiff.all()
                             else np.flatnonzero(~stiff))
        self.other_rows = np.setdiff1d(self.moving, self.moving[self.flow_columns])
        if not settings.flow_context:
            self.context_columns, self.other_rows = np.zeros(0, dtype=int), np.zeros(0, dtype=int)
        else:
            self.context_columns = context_angles(zmat, self.moving[self.flow_columns])
        periodic = np.r_[np.zeros(len(self.context_columns), bool), np.ones(len(self.other_rows), bool)]
        seeds_ic = cartesian_to_internal(zmat, torch.as_tensor(seeds_nm))
        with torch.random.fork_rng():  # the network's initial weights follow the run's seed
            torch.manual_seed(seed)
            self.flow = TorsionFlow(seeds_ic.torsions_rad[:, self.moving].numpy(), self.flow_columns,
                                    periodic, transforms=settings.flow_layers,
                                    hidden=settings.flow_hidden, bins=settings.flow_bins)
        self.optimizer = torch.optim.AdamW(self.flow.parameters(), lr=settings.learning_rate,
                                           weight_decay=settings.weight_decay)
        self.buffer: deque = deque(maxlen=settings.buffer_size)

    @property
    def flow_rows(self) -> np.ndarray:
        """Torsion rows the flow redraws."""
        return self.moving[self.flow_columns]

    def conditioning(self, ic: InternalCoords) -> torch.Tensor:
        """The flow's conditioning input of states ``ic``: angles, then left-out torsions."""
        return torch.cat([ic.angles_rad[:, self.context_columns], ic.torsions_rad[:, self.other_rows]], 1)

    def add(self, positions_nm: np.ndarray) -> None:
        """Queue states for the fit: moving torsions, then the flow's context (float32)."""
        with torch.no_grad():
            ic = cartesian_to_internal(self.zmat, torch.as_tensor(positions_nm, dtype=torch.float64))
        rows = torch.cat([ic.torsions_rad[:, self.moving], self.conditioning(ic)], 1)
        self.buffer.extend(rows.numpy().astype(np.float32))

    def fit(self, rng: np.random.Generator, torch_rng: torch.Generator, log) -> None:
        """Refit base and splines on the buffer; undo the refit if the flow diverges.

        ``log(message)`` reports a rolled-back refit.
        """
        s = self.settings
        data = torch.as_tensor(np.stack(self.buffer), dtype=torch.float64)
        m = len(self.moving)
        torsions, context = data[:, :m], data[:, m:]
        flow_t = torsions[:, torch.as_tensor(self.flow_columns)]
        saved = (copy.deepcopy(self.flow.state_dict()), copy.deepcopy(self.optimizer.state_dict()))
        self.flow.refit_base(torsions.numpy(), context.numpy())
        loss = float("nan")
        for _ in range(s.fit_steps):
            index = torch.as_tensor(rng.integers(0, len(data), s.fit_batch))
            loss = self.flow.fit_step(self.optimizer, flow_t[index], context[index], s.context_noise, torch_rng)
        with torch.no_grad():
            # the newest states, least seen by the fit
            check = self.flow.log_prob(flow_t[-CHECK_ROWS:], context[-CHECK_ROWS:])
            base = self.flow.base_log_prob(flow_t[-CHECK_ROWS:])
        if not (math.isfinite(loss) and torch.isfinite(check).all()):
            self.flow.load_state_dict(saved[0])
            self.optimizer.load_state_dict(saved[1])
            log(f"flow refit diverged (loss {loss}); rolled back")
        elif check.mean() < base.mean():
            # Worse than its own base on the newest data (overfitting or a moved base):
            # start the splines again from the identity, which is the base.
            self.flow.reset_transforms()

    def state_dict(self) -> dict:
        return {"flow": self.flow.state_dict(), "optimizer": self.optimizer.state_dict()}

    def load_state_dict(self, state: dict) -> None:
        self.flow.load_state_dict(state["flow"])
        self.optimizer.load_state_dict(state["optimizer"])
