"""robustbox: certified inner boxes of injections for AC power flow, as a Pyomo extension.

For every injection vector inside a certified box an AC power-flow solution
within all security limits provably exists.  Pipeline (one module per stage):
data (:mod:`robustbox.grid`) → quadratic system (:mod:`robustbox.quadratic`)
→ remainder bounds (:mod:`robustbox.bounds`) → certificate
(:mod:`robustbox.certify`) → validation (:mod:`robustbox.validate`) →
report (:mod:`robustbox.report`) and command line (:mod:`robustbox.cli`).
"""
from .bounds import RemainderOptions
from .certify import Certificate, CertifyOptions, ConditionCheck, LimitResponse, certify
from .errors import (CaseFileError, CertificateError, ModelStructureError, NetworkError, OperatingPointError,
                     QuadraticSystemError, RobustboxError, RobustboxNote, SolverError)
from .quadratic import QuadraticMap, QuadraticSystem, UncertainSet
from .transform import InjectionBox  # registers the transformation robustbox.injection_box

__version__ = "0.1.0"

__all__ = [
    "CaseFileError", "Certificate", "InjectionBox", "CertificateError", "CertifyOptions", "ConditionCheck", "LimitResponse", "ModelStructureError",
    "NetworkError", "OperatingPointError", "QuadraticMap", "QuadraticSystem", "QuadraticSystemError",
    "RemainderOptions", "RobustboxError", "RobustboxNote", "SolverError", "UncertainSet", "certify",
]
