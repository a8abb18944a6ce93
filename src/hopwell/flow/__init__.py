"""Normalizing-flow proposals in internal coordinates for hopwell."""

from hopwell.flow.base import InternalBase, pack, unpack
from hopwell.flow.model import ConformerFlow, reduced_energy

__all__ = ["ConformerFlow", "InternalBase", "pack", "reduced_energy", "unpack"]
