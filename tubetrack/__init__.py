"""tubetrack: X-ray generator logs in, X-ray tube decisions out.

Heavy libraries (altair, scikit-learn, scipy, pydicom, pyspark) are imported lazily inside the
functions that need them so that ``tubetrack --help`` starts fast.
"""

__version__ = "0.1.0"
