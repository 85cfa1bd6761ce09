"""tubetrack.fleet"""
