"""Monte Carlo moves, one module each, all with the interface of :class:`hopwell.moves.base.Move`."""
