"""An example rehear stage shipped as its own package: see stage.py and the README beside it."""
