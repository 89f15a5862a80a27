"""Let a stage module be called like its main function.

``specan.prepare`` and ``specan.classify`` are both modules (one per pipeline stage)
and, by the public API, functions: ``specan.prepare(spectrum)``. Importing a
submodule rebinds the package attribute to the module, so the module itself is
made callable (module ``__class__`` assignment, allowed since Python 3.5).
"""

import sys
import types


def make_callable(module_name: str, function_name: str) -> None:
    """Make ``sys.modules[module_name](...)`` call its ``function_name``."""
    module = sys.modules[module_name]

    class _CallableModule(types.ModuleType):
        def __call__(self, *args, **kwargs):
            return getattr(self, function_name)(*args, **kwargs)

    module.__class__ = _CallableModule
