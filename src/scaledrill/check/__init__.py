"""Equivalence check: accumulation, virtual workers and real processes against the true large batch.

verb.py runs it; reference.py is the float64 ground truth; paths.py, processes.py and
threads.py run the engine's paths, real processes and a user's own step;
batchnorm.py decides which BatchNorm statistics they train with and which can serve
check.batchnorm=global;
tolerance.py holds the rounding-derived rule; diagnose*.py name the cause of a
mismatch; dropout.py is the sample-keyed dropout the diagnosis offers as a fix.
"""

from .verb import check_verb

__all__ = ["check_verb"]
