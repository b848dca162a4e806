"""Layer 7, integration: lab and EHR systems. Standard codes (LOINC, UCUM, HL7 tables), FHIR, HL7 v2
and MLLP, message and table batch runs, distributed runs."""
