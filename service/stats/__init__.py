"""Statistical primitives used by the gate's checks.

Pure numpy/scipy. Every public function cites the published method it implements and validates
its inputs with a message that names the parameter; none returns a silent NaN.
"""
