"""kaledger: curation and validation pipeline for pKa/Ka reference data."""
