"""The HTTP side: unit board, JSON API, FHIR subscription hook, health and metrics."""
