"""gasgap: blood-gas oxygenation indices and advisory flags.

``monitor.engine`` is the pure core; the modules beside it are the shell that owns
time, configuration and I/O.
"""
