"""Reliability tests: the service killed, its database and its channels taken away,
hostile input on every way in. Loopback only, bounded in time."""
