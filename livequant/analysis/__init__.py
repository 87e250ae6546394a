"""Pure numerics: lattice, columns, sublattices, refinement, cells.

Nothing in this package does I/O, logging set-up or keeps global state, and it
imports nothing else from livequant, so the same functions run in the daemon's
workers, in a notebook and in tests.
"""
