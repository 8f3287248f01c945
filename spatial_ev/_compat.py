"""Optional dependencies, imported in one place and only when asked for."""

from __future__ import annotations

from spatial_ev.errors import InputError


def import_distributed():
    """Return the ``dask.distributed`` module or raise a clear error naming the extra.

    Examples
    --------
    >>> import_distributed().__name__  # doctest: +SKIP
    'distributed'
    """
    try:
        import distributed  # noqa: F401  (dask.distributed's package)
    except ImportError:  # pragma: no cover - depends on the environment
        raise InputError("engine='dask' needs dask.distributed; install it with "
                         "`pip install 'spatial_ev[distributed]'`") from None
    return distributed
