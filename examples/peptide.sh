#!/usr/bin/env bash
# Ace-Ala-NMe in OBC2 water, Amber ff14SB: backbone populations and 3J(HN,HA) couplings.
# Usage: bash examples/peptide.sh [HOURS]      (default 1 hour; the tests run 0.01)
set -euo pipefail
hours=${1:-1}
out=${OUT:-dipeptide-obc2}
hopwell run systems/ace_ala_nme.pdb -o "$out" --solvent obc2 --hours "$hours"
hopwell report "$out"                                   # backbone regions, couplings
hopwell report "$out" --states examples/peptide_states.toml
