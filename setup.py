"""The compiled modules; everything else about the build is in pyproject.toml.

Each is optional: without a C compiler and Python's headers the install goes on, and the
same steps run in Python (daemon/compiled.py says which are built).
- model/_chunk_scan.c: the tokenizer's chunk scan (model/words.py, ``python_scan``);
- model/_digest_probe.c: the token digest cache's lookup (model/digest_cache.py,
  ``python_probe``);
- model/_pair_hashes.c: a message's distinct word-pair hashes (model/pairs.py,
  ``python_first_pairs``);
- model/_fisher_pick.c: Robinson's f of a message's tokens and Fisher's choice among them
  (model/fisher.py, ``RobinsonFisher.python_pick``); built without contracting a product and
  a sum into one fused step, so its floats are numpy's bit for bit;
- store/_count_probe.c: the count cache's lookup (store/cache.py, ``python_get``).
"""

from setuptools import Extension, setup

setup(
    ext_modules=[
        Extension("mailweir.model._chunk_scan", ["model/_chunk_scan.c"], optional=True),
        Extension(
            "mailweir.model._digest_probe",
            ["model/_digest_probe.c"],
            depends=["model/_typed_buffer.h"],
            optional=True,
        ),
        Extension(
            "mailweir.model._pair_hashes",
            ["model/_pair_hashes.c"],
            depends=["model/_typed_buffer.h"],
            optional=True,
        ),
        Extension(
            "mailweir.model._fisher_pick",
            ["model/_fisher_pick.c"],
            depends=["model/_typed_buffer.h"],
            extra_compile_args=["-ffp-contract=off"],
            optional=True,
        ),
        Extension("mailweir.store._count_probe", ["store/_count_probe.c"], optional=True),
    ]
)
