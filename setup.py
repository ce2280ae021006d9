"""Builds the optional compiled kernels; everything else about the package is in pyproject.toml."""

from setuptools import Extension, setup

setup(ext_modules=[Extension(
    "stages.lexicon.sound._lexfast", ["stages/lexicon/sound/_lexfast.c"], optional=True,  # without a compiler numpy does the work
    # No fused multiply-add: the kernels must round exactly as the numpy code they replace.
    extra_compile_args=["-O2", "-ffp-contract=off"])])
