"""Linear theory and BAO templates: EH98 / tabulated P(k), Hankel transforms, the template."""

from corrpipe.theory.hankel import pk_to_xi, pk_to_xi_grid
from corrpipe.theory.linear_power import LinearPower
from corrpipe.theory.template import BAOTemplate, multipole_weights

__all__ = ["LinearPower", "BAOTemplate", "pk_to_xi", "pk_to_xi_grid", "multipole_weights"]
