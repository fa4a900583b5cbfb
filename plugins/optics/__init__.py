"""Pure optical functions: no I/O, no engine, no state.

Units: dioptres (D) for powers, prism dioptres (Δ), millimetres for lengths
unless a name says otherwise, degrees for angles in the standard axis notation
(seen facing the wearer, 0° at the observer's right, counter-clockwise).

2×2 power matrices are plain tuples of floats (:class:`PowerMatrix`): at this
size, numpy's call overhead costs more than the arithmetic.
"""
