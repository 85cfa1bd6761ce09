"""tubetrack.physics"""
