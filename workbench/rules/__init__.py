"""Verdict rules, one module per family of checks; each registers its rules
with :func:`workbench.verdicts.rule`."""
