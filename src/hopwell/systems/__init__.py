"""Reading molecules and building force-field systems (MMFF94/MMFF94s, Amber ff14SB, OBC2)."""
