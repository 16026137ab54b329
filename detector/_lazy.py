"""Public names of a package that load their module on first use.

A package's ``__init__`` lists its public API once (``__all__``) and maps each name to the
module that defines it; the module is imported when the name is first read. Importing a
package therefore costs nothing until one of its names is used, so that, for example,
``frostvane screen`` does not import the training stack (scikit-learn, ONNX export).
"""

import importlib

__all__ = ["lazy_exports"]


def lazy_exports(package, where):
    """Module-level ``__getattr__`` and ``__dir__`` of ``package`` for the names in ``where``.

    Parameters
    ----------
    package : str
        The package's ``__name__``.
    where : dict of str to str
        Public name -> module, relative to the package (``"train"``, ``"fitting.train"``).

    Returns
    -------
    getattr_, dir_ : callable
        To be bound to ``__getattr__`` and ``__dir__`` in the package's namespace.
    """

    def getattr_(name):
        if name in where:
            return getattr(importlib.import_module(f".{where[name]}", package), name)
        raise AttributeError(f"module {package!r} has no attribute {name!r}")

    def dir_():
        import sys

        return sorted(set(vars(sys.modules[package])) | set(where))

    return getattr_, dir_
