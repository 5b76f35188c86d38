"""The edges: outside data in (FHIR, HL7 v2, files) and notifications out."""
