"""The tile loop: the only code that reads tiles of the archive *and* runs kernels on them.

``loop`` drives tasks over tiles (threads or a dask cluster), ``_tasks`` holds the per-tile
task bodies, ``_passes`` the checkpointed passes, ``_slots`` the per-worker accumulation slots,
``compress`` and ``_method_passes`` the passes of each compress method, ``_floor`` the
hand-written single-pass measurement the benchmark compares against. Below it: ``archive``
(readers), ``lifting``, ``linalg`` (pure kernels on arrays) and ``fitting``.
"""
