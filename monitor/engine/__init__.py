"""The pure core: formulas, pairing, derivation, trends, rules and the alert state machine.

No I/O, no database, no clock: time comes in as an argument. It imports nothing of
gasgap's outside itself (``tests/unit/engine/test_engine_imports.py`` checks).
"""
