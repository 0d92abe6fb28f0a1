"""Equivalence check: accumulation, virtual workers and real processes against the true large batch.

scaledrill.commands.check runs it; reference.py is the float64 ground truth; paths.py, processes.py and
threads.py run the engine's paths, real processes and a user's own step;
batchnorm.py decides which BatchNorm statistics they train with and which can serve
check.batchnorm=global;
tolerance.py holds the rounding-derived rule; diagnose*.py name the cause of a
mismatch (the sample-keyed dropout it offers as a fix is scaledrill.nn.dropout).
"""
