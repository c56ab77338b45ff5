"""Reconstruction: the plug-in contract, the registry, projectors and reference algorithms.

See :mod:`simbench.recon.contract` for the contract and :mod:`simbench.recon.registry` for
how reconstructors are found.
"""

from simbench.recon.contract import Acquisition, Option, Reconstructor, reconstructor


def __getattr__(name: str):
    # the projectors load numba kernels: imported on first use, so that the contract stays
    # light for plug-in packages and for the command line's start-up
    if name in ("projector", "Projector"):
        from simbench.recon import projectors

        return getattr(projectors, name)
    raise AttributeError(f"module 'simbench.recon' has no attribute {name!r}")


__all__ = ["Acquisition", "Option", "Reconstructor", "reconstructor", "projector", "Projector"]
