"""FHIR R4 inbound adapter: resources, Bundles, NDJSON, REST polling and rest-hook
notifications -> canonical ``Reading`` values.

- ``observations``: ``FhirReadingBuilder`` (the mapping; identity rules in its docstring)
- ``bundles``: Bundle and NDJSON iteration
- ``poller``: ``FhirPoller`` (search by code and ``_lastUpdated``, paging, retries)
- ``subscription``: ``parse_notification`` for rest-hook deliveries
- ``strict``: full validation with fhir.resources (strict mode, tests)
"""

from adapters.fhir.observations import FhirBatch, FhirReadingBuilder, FhirRejection

__all__ = ["FhirBatch", "FhirReadingBuilder", "FhirRejection"]
