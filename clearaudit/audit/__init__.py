"""Clearance audit: conditions (survey, MOT, wind, ice), clearances, obstacles and priorities.

>>> from clearaudit.audit import audit_line, AuditResult
>>> from clearaudit.audit.rules import load_rule_set
"""
from .engine import AuditOptions, AuditResult, audit_line, default_insulator_length_m

__all__ = ["AuditOptions", "AuditResult", "audit_line", "default_insulator_length_m"]
