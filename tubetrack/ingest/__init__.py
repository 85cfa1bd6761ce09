"""tubetrack.ingest"""
