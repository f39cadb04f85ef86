"""study-audit: what completed studies could and could not detect.

The library API behind the ``study-audit`` command::

    import audit
    result = audit.audit_file("portfolio.xlsx")
    result.metrics            # one column per metric, one row per study
    result.to_dict()          # the JSON document of the output contract
    result.findings           # one line per rule flag: pos, rule, severity, message
    audit.audit_file("portfolio.xlsx", rules="our-thresholds.toml")  # bundled rules + overrides
"""

from __future__ import annotations

__version__ = "0.1.0"

from audit.designs import DESIGNS
from audit.errors import AuditError, ConfigError, InputError
from audit.metrics import METRICS
from audit.pipeline import AuditResult, audit_file, audit_table
from audit.read import read_table
from audit.rules import RuleSet, load_rules

__all__ = [
    "DESIGNS",
    "METRICS",
    "AuditError",
    "AuditResult",
    "ConfigError",
    "InputError",
    "RuleSet",
    "__version__",
    "audit_file",
    "audit_table",
    "load_rules",
    "read_table",
]
