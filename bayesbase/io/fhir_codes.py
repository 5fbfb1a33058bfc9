"""The FHIR R4 systems, extensions and code tables the reader and the writer share."""
from __future__ import annotations

import re

__all__ = ["PATIENT_ANIMAL", "UCUM", "LOINC", "SNOMED", "NCBI_TAXON", "GENDER_STATUS",
           "FASTING_SYSTEM", "OBS_CATEGORY", "QUALITY_SYSTEM", "STATE_EXTENSION",
           "REPLICATE_EXTENSION", "ID_SYSTEM_PATIENT", "ID_SYSTEM_SPECIMEN", "LOINC_TO_ANALYTE",
           "SPECIES_CODES", "SPECIES_TEXT", "EXPORT_SPECIES", "SKIP_STATUS", "READ_STATUS",
           "QUALITY_PATTERNS", "COMPARATOR"]

PATIENT_ANIMAL = "http://hl7.org/fhir/StructureDefinition/patient-animal"
UCUM = "http://unitsofmeasure.org"
LOINC = "http://loinc.org"
SNOMED = "http://snomed.info/sct"
NCBI_TAXON = "http://www.ncbi.nlm.nih.gov/taxonomy"  # from memory (system URI used for NCBI ids)
GENDER_STATUS = "http://hl7.org/fhir/animal-genderstatus"
FASTING_SYSTEM = "http://terminology.hl7.org/CodeSystem/v2-0916"
OBS_CATEGORY = "http://terminology.hl7.org/CodeSystem/observation-category"
#: Project code system for sample-quality index Observations (no standard code used).
QUALITY_SYSTEM = "urn:bayesbase:fhir:sample-quality"
#: Project extensions (no standard element exists for these).
STATE_EXTENSION = "urn:bayesbase:fhir:health-state"
REPLICATE_EXTENSION = "urn:bayesbase:fhir:replicate"
ID_SYSTEM_PATIENT = "urn:bayesbase:patient"
ID_SYSTEM_SPECIMEN = "urn:bayesbase:specimen"

#: LOINC code -> analyte name as the laboratory reports it (resolved by bayesbase.units; the
#: name matters for urea nitrogen, whose mg/dL converts with the BUN factor). Codes: the
#: project's interoperability notes ("confirmed on stored pages"), except where marked.
LOINC_TO_ANALYTE = {
    "2160-0": "creatinine", "14682-9": "creatinine",
    "3094-0": "urea nitrogen",
    "2345-7": "glucose", "14749-6": "glucose",
    "1742-6": "alt", "1920-8": "ast", "6768-6": "alp", "2324-2": "ggt",
    "1751-7": "albumin", "2885-2": "total_protein",
    "2093-3": "cholesterol", "14647-2": "cholesterol",
    "17861-6": "calcium", "2951-2": "sodium", "2823-3": "potassium", "2075-0": "chloride",
    "1975-2": "total_bilirubin",
    "2028-9": "bicarbonate",  # total CO2
    "2777-1": "phosphate", "2571-8": "triglycerides", "3026-2": "total_t4",  # from memory
    "15069-8": "fructosamine",  # from memory
}

#: Species codes -> canonical species (SNOMED: project's interoperability notes; NCBI: memory).
SPECIES_CODES = {
    (SNOMED, "448771007"): "dog", (SNOMED, "448169003"): "cat",
    (NCBI_TAXON, "9615"): "dog", (NCBI_TAXON, "9685"): "cat", (NCBI_TAXON, "9796"): "horse",
}
SPECIES_TEXT = {
    "dog": "dog", "canine": "dog", "canis familiaris": "dog", "canis lupus familiaris": "dog",
    "canis lupus subsp. familiaris": "dog", "cat": "cat", "feline": "cat", "felis catus": "cat",
    "felis silvestris catus": "cat", "domestic cat": "cat", "domestic dog": "dog",
    "horse": "horse", "equine": "horse", "equus caballus": "horse",
}
#: Species -> the codings the writer gives it.
EXPORT_SPECIES = {
    "dog": [(SNOMED, "448771007", "Canis lupus subsp. familiaris"),
            (NCBI_TAXON, "9615", "Canis lupus familiaris")],
    "cat": [(SNOMED, "448169003", "Felis catus"), (NCBI_TAXON, "9685", "Felis catus")],
    "horse": [(NCBI_TAXON, "9796", "Equus caballus")],
}
SKIP_STATUS = {"entered-in-error", "cancelled", "registered", "unknown"}
READ_STATUS = {"final", "amended", "corrected", "preliminary"}
#: Code text / display naming a sample-quality index.
QUALITY_PATTERNS = (
    ("haemolysis", re.compile(r"ha?emoly[sz]", re.I)),
    ("lipaemia", re.compile(r"lipa?emi|lipemic|lipaemic", re.I)),
    ("icterus", re.compile(r"icter", re.I)),
)
COMPARATOR = {"<": "left", "<=": "left", ">": "right", ">=": "right"}
