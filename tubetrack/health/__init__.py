"""tubetrack.health"""
