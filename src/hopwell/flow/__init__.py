"""The trainable proposal densities: the torsion flow and its von Mises mixture base."""
