"""The compiled part of leastwise (everything else is in pyproject.toml).

``_leastwise_native`` holds kernels of ``leastwise.engine.gram`` (``service/native``): the
extended-precision Gram sums, the split of the folded Gram matrix, one refinement residual.
It is optional: without a C compiler the install goes on and ``leastwise.engine.gram``
computes the same bits with numpy, more slowly. CI requires it (tests/engine/test_native.py).
"""

from setuptools import Extension, setup

setup(
    ext_modules=[
        Extension(
            "_leastwise_native",
            ["service/native/leastwise_native.c"],
            # no fused multiply-add: every product rounds once, as numpy's does
            extra_compile_args=["-O2", "-ffp-contract=off"],
            optional=True,
        )
    ]
)
