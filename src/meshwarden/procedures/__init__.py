"""Pure cores of the calibration, locking and fault-scan procedures.

Each module here takes numpy arrays or plain values and returns arrays or small frozen
dataclasses with an ``as_dict()`` for JSON. Nothing here touches a board, a clock, a file or an
event loop: the async runners that move outputs and read monitors call these cores.

* :mod:`.fringe` - fit of a phase actuator's power fringe; four-step phase stepping
* :mod:`.coupler_fit` - coupling ratio from bar/cross powers; monotone kappa(V) table
* :mod:`.phase_table` - a fitted fringe as a monotone phase table, with its quality gate
* :mod:`.order` - the progressive calibration order of a lattice of gates
* :mod:`.dither` - orthogonal dithers, lock-in demodulation, a normalised PI step
* :mod:`.designs` - Hadamard and S-matrix perturbation designs and their estimator
* :mod:`.verdicts` - scan verdict rules and detector noise
"""

from meshwarden.procedures.inputs import ProcedureInputError

__all__ = ["ProcedureInputError"]
