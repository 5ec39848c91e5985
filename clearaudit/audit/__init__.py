"""Clearance audit: conditions (survey, MOT, wind, ice), clearances, obstacles and priorities.

>>> from clearaudit.audit import audit_line, AuditResult
>>> from clearaudit.audit.rules import load_rule_set
"""
__all__ = ["AuditOptions", "AuditResult", "audit_line", "default_insulator_length_m"]


def __getattr__(name: str):
    """The engine's names, imported on first use (PEP 562): reading a rule set
    (:mod:`clearaudit.audit.rules`) does not import the engine and its scipy modules
    (≈ 0.27 s), so a run's start-up does not wait for them."""
    if name in __all__:
        from . import engine

        return getattr(engine, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
