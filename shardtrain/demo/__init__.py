"""Stage 6, demo: the whole workflow on the invented parcel-delivery network."""
