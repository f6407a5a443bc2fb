"""Numerical core of latticeread: plain functions on numpy arrays.

Nothing in this package imports Qt or touches files; a test checks it.

Coordinate convention (used everywhere): ``x`` is the column and ``y`` the row of the
camera image, measured in pixels, with the *centre* of pixel ``(row 0, col 0)`` at
``(x, y) = (0, 0)``; ``y`` grows downwards. Lattice site ``(row, col)`` sits at
``offset + row * a1 + col * a2`` where ``a1``, ``a2`` and ``offset`` are ``(x, y)`` pairs.
"""
