"""The decision: pure functions from snapshots and a policy to a verdict. No I/O, no clock."""
