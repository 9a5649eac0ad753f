"""The archive format: layout, manifest, rebuild arithmetic, error ledger and bounds.

This is the shared floor of rankfold: the builder writes through it, and the client and the
SQL functions read through it, so every bound is computed one way only.
"""
