"""mpo_fronts: operator fronts and OTOC light cones in 1D spin chains by Heisenberg-picture MPO TEBD.

Conventions: spin-1/2 operators S = sigma/2, hbar = 1, open chain, sites 0..L-1, time in units of 1/J.
C(r, t) = 1 - Re Tr[W(t) V_r W(t) V_r] / 2^L (infinite temperature) in [0, 2].
"""

from .conventions import CONVENTIONS, __version__
from .errors import ConfigError, FrontsError, InputError, RunDirectoryError, UserError
from .models import Chain, mixed_field_ising_chain, nn_chain, xxz_chain
from .evolve import OperatorTEBD
from .schedules import step_plan, time_grid
from .readout import OtocResult
from .driver import evolve_otoc
from .settings import EvolutionSettings

def exact_otoc(*args, **kwargs):
    """Dense exact OTOCs (L <= 12); see :func:`mpo_fronts.exact.exact_otoc`."""
    from .exact import exact_otoc as _exact_otoc

    return _exact_otoc(*args, **kwargs)


def typicality_otoc(*args, **kwargs):
    """OTOCs by dynamical typicality with sparse Krylov evolution (L up to about 24); see
    :func:`mpo_fronts.exact.typicality_otoc`."""
    from .exact import typicality_otoc as _typicality_otoc

    return _typicality_otoc(*args, **kwargs)


def eigenstate_otoc(*args, **kwargs):
    """Eigenstate-resolved OTOCs (dense, L <= 12); see :func:`mpo_fronts.exact.eigenstate_otoc`."""
    from .exact import eigenstate_otoc as _eigenstate_otoc

    return _eigenstate_otoc(*args, **kwargs)


def free_fermion_otoc(*args, **kwargs):
    """Closed-form OTOCs of the XX chain (free fermions); see :func:`mpo_fronts.exact.free_fermion_otoc`."""
    from .exact import free_fermion_otoc as _free_fermion_otoc

    return _free_fermion_otoc(*args, **kwargs)


def load(path):
    """Load a run directory or merged file; see :func:`mpo_fronts.store.load`."""
    from .store import load as _load

    return _load(path)


__all__ = ["xxz_chain", "mixed_field_ising_chain", "nn_chain", "Chain", "evolve_otoc", "exact_otoc",
           "typicality_otoc", "eigenstate_otoc", "free_fermion_otoc", "load", "OtocResult", "EvolutionSettings",
           "OperatorTEBD", "step_plan", "time_grid", "FrontsError", "UserError", "InputError", "ConfigError",
           "RunDirectoryError", "CONVENTIONS", "__version__"]
