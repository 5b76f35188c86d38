"""FHIR integration tests run against the real FHIR test server (tests/fhir_server.py)."""

from tests.fhir_server import fhir_server  # noqa: F401
