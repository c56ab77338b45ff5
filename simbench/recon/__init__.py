"""Reconstruction: the plug-in contract, the registry, projectors and reference algorithms.

See :mod:`simbench.recon.contract` for the contract and :mod:`simbench.recon.registry` for
how reconstructors are found.
"""

from simbench.recon.contract import Acquisition, Option, Reconstructor, reconstructor

__all__ = ["Acquisition", "Option", "Reconstructor", "reconstructor"]
