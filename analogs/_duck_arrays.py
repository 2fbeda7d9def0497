"""xarray's checks for dask and pint arrays without importing dask.array and pint, and
its check for a dask.distributed client without importing distributed.

xarray asks, for every array it wraps or converts, whether it is a dask array or a pint
quantity (``xarray.namedarray.pycompat.array_type``), and to know the classes it
imports those libraries on first use: ``dask.array`` (which imports ``scipy.sparse``)
and ``pint`` cost about 0.4 s of CPU in a ``find --report`` that holds neither kind of
array. An object of ``dask.array.Array`` or ``pint.Quantity`` cannot exist before its
module is imported, so the check "is ``x`` such an array" is answered exactly by looking
for the module in ``sys.modules`` first: :func:`defer_duck_array_imports` gives xarray
that check, and the library itself, with its version, when xarray asks for more than
the class. xarray's ``is_dask_collection`` (which imports dask itself) answers the
objects dask's own first test answers (types, objects without ``__dask_graph__``)
without importing dask. It relies on xarray's record of these libraries (``pycompat.
_cached_duck_array_modules``, ``DuckArrayModule``; xarray 2023.x to 2026.x): where a
version of xarray has no such record, or has already filled it, it changes nothing and
xarray imports the libraries as before (tests/test_duck_arrays.py runs both paths).

Writing any NetCDF file, xarray asks which dask scheduler is active (to pick its write
lock and whether to close files between writes), and the question imports
``distributed`` when it is installed (0.3 s of every store write). A client cannot exist
before ``distributed`` is imported, so while it is not, and no scheduler is configured,
the answer is xarray's own for that case, "threaded":
:func:`scheduler_probe_without_distributed`. Nor is dask imported (0.13 s) to read its
configuration while nothing could have set it: dask not imported, no ``DASK_*``
environment variable and none of the YAML paths dask reads on import.
"""

from __future__ import annotations

import contextlib
import functools
import importlib.util
import os
import sys

#: The duck-array libraries deferred: xarray's name of each, and where its array class is.
DEFERRED = {"dask": ("dask.array", "Array"), "pint": ("pint", "Quantity")}


class _ClassOnceImported(type):
    """Metaclass of a stand-in whose isinstance check is that of the named class when
    its module is imported, and False before (no instance can exist yet)."""

    def __instancecheck__(cls, instance) -> bool:
        module = sys.modules.get(cls.module_name)
        real = getattr(module, cls.class_name, None) if module is not None else None
        return real is not None and isinstance(instance, real)


def defer_duck_array_imports() -> bool:
    """Give xarray the deferred checks of :data:`DEFERRED` (see the module's docstring);
    True when they are in place (now or from an earlier call), False when this xarray
    keeps its own."""
    try:
        from xarray.namedarray import pycompat
        cache, record = pycompat._cached_duck_array_modules, _deferred_record_class()
    except (ImportError, AttributeError, TypeError):
        return False
    if not isinstance(cache, dict):
        return False
    for name, (module_name, _) in DEFERRED.items():
        if name not in cache and module_name not in sys.modules \
                and importlib.util.find_spec(name) is not None:
            cache[name] = record(name)
    _defer_dask_collection_check()
    return any(isinstance(cache.get(name), record) for name in DEFERRED)


@contextlib.contextmanager
def duck_array_imports_deferred():
    """:func:`defer_duck_array_imports` within the block; on leaving it, xarray's
    records of :data:`DEFERRED` and its ``is_dask_collection`` are as they were before
    (a record deferred here is dropped: xarray builds its own when next asked)."""
    try:
        from xarray.namedarray import pycompat, utils
        cache, own_check = pycompat._cached_duck_array_modules, utils.is_dask_collection
    except (ImportError, AttributeError):
        yield
        return
    before = {name: cache[name] for name in DEFERRED if name in cache} if isinstance(
        cache, dict) else None
    defer_duck_array_imports()
    try:
        yield
    finally:
        utils.is_dask_collection = own_check
        if before is not None:
            for name in DEFERRED:
                if name in before:
                    cache[name] = before[name]
                elif isinstance(cache.get(name), _deferred_record_class()):
                    del cache[name]


def _defer_dask_collection_check() -> None:
    """xarray's ``is_dask_collection`` (asked of every array it wraps, through
    ``is_duck_dask_array``) imports ``dask.base``, and with it dask (about 0.3 s CPU),
    to ask dask's own ``is_dask_collection``, whose first test needs no dask: a type, or
    an object without a callable ``__dask_graph__``, is not a collection. The deferred
    check answers those without importing dask and hands every other object to
    xarray's own check (tests/test_duck_arrays.py compares the answers with dask's)."""
    try:
        from xarray.namedarray import utils
        own = utils.is_dask_collection
    except (ImportError, AttributeError):
        return
    if getattr(own, "deferred", False):
        return

    @functools.wraps(own)
    def is_dask_collection(x) -> bool:
        if "dask" not in sys.modules and (
                isinstance(x, type) or not callable(getattr(x, "__dask_graph__", None))):
            return False
        return own(x)

    is_dask_collection.deferred = True
    utils.is_dask_collection = is_dask_collection


@functools.cache
def _deferred_record_class():
    """A subclass of xarray's record of a duck-array library whose class check is
    deferred (:class:`_ClassOnceImported`); the rest (the module, its version, whether
    it is there) is xarray's own record, built when first asked for."""
    from xarray.namedarray.pycompat import DuckArrayModule

    class DeferredRecord(DuckArrayModule):
        def __init__(self, name: str) -> None:  # xarray's __init__ would import it
            self.name = name
            module_name, class_name = DEFERRED[name]
            self.type = (_ClassOnceImported(f"Deferred{class_name}", (), {
                "module_name": module_name, "class_name": class_name}),)

        @functools.cached_property
        def _loaded(self):
            return DuckArrayModule(self.name)

        module = property(lambda self: self._loaded.module)
        version = property(lambda self: self._loaded.version)
        available = property(lambda self: self._loaded.available)

    return DeferredRecord


def _dask_config_paths() -> list[str]:
    """The folders (or files) of YAML configuration dask reads on import when no
    ``DASK_*`` variable is set (``dask.config.paths``, from ``dask.config._get_paths``;
    compared with dask's own in tests/test_duck_arrays.py)."""
    import site
    return ["/etc/dask", os.path.join(sys.prefix, "etc", "dask"),
            *[os.path.join(prefix, "etc", "dask") for prefix in site.PREFIXES],
            os.path.join(os.path.expanduser("~"), ".config", "dask")]


def _dask_configured() -> bool:
    """Whether dask, once imported, could hold configuration beyond its own defaults
    (which name no scheduler): a ``DASK_*`` environment variable (``collect_env``) or
    an existing YAML path (``collect_yaml``)."""
    return any(name.startswith("DASK_") for name in os.environ) or any(
        os.path.exists(path) for path in _dask_config_paths())


@contextlib.contextmanager
def scheduler_probe_without_distributed():
    """Within the block, xarray's NetCDF writers check the dask scheduler without
    importing ``distributed`` while nothing could have made a client (see the module's
    docstring), and with xarray's own check otherwise; xarray's check is put back on
    exit. Where this xarray has no such check where expected, nothing changes."""
    try:
        from xarray.backends import locks, writers
        original = locks.get_dask_scheduler
    except (ImportError, AttributeError):
        yield
        return
    if getattr(writers, "get_dask_scheduler", None) is not original:
        yield
        return

    @functools.wraps(original)
    def get_dask_scheduler(get=None, collection=None):
        if get is None and collection is None and "distributed" not in sys.modules:
            if "dask" not in sys.modules and not _dask_configured():
                return "threaded"  # as below once dask is imported: no scheduler set
            try:
                import dask
            except ImportError:
                return original(get, collection)
            if dask.config.get("scheduler", None) is None \
                    and dask.config.get("get", None) is None:
                return "threaded"
        return original(get, collection)

    locks.get_dask_scheduler = writers.get_dask_scheduler = get_dask_scheduler
    try:
        yield
    finally:
        locks.get_dask_scheduler = writers.get_dask_scheduler = original
