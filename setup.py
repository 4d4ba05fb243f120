"""The one compiled module; everything else about the build is in pyproject.toml.

The tokenizer's chunk scan in C (model/_chunk_scan.c) is optional: without a C compiler and
Python's headers the install goes on, and model/words.py runs the same steps in Python.
"""

from setuptools import Extension, setup

setup(
    ext_modules=[
        Extension("mailweir.model._chunk_scan", ["model/_chunk_scan.c"], optional=True),
    ]
)
