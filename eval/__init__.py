"""Evaluation of diag's diagnosis on units generated with ngspice (see eval/README.md)."""
