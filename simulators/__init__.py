"""Synthetic Bell-test sources that publish labwatch wire protocol v1.

Quantum sources (qubits and qudits), local-hidden-variable sources and drift models, used by
tests and demos.  ``simulators.base.PairSource`` is the interface; ``simulators.publisher``
turns a source into a ZeroMQ stream.
"""
