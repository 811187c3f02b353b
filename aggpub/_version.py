__version__ = "0.1.0"
BUNDLE_FORMAT = "aggpub-bundle/1"
