"""The compiled backend: numba kernels generated for one model and one method.

The modules, from the text of a kernel to running it:

- :mod:`.blocks`: members per block, the unit every kernel loops over;
- :mod:`.expressions`: straight-line scalar code of :mod:`ensemble.model.ir` trees;
- :mod:`.schedules` and :mod:`.rates`: the model's rates at the stages of a step, per
  member, with the schedule values in force;
- :mod:`.explicit` (Butcher tableaux) and :mod:`.implicit` (theta methods, with
  :mod:`.newton_matrix` planning the Newton matrix and :mod:`.sparsity` its factors'
  pattern): one step of a block of members;
- :mod:`.reports`: what is kept at each reported time (trajectories, or the step check's
  comparison);
- :mod:`.scalars` and :mod:`.block_lu`: plain functions whose source is copied into the
  kernels;
- :mod:`.source`: the whole module text (:class:`~.source.KernelSource`);
- :mod:`.cache`: kernel files on disk and the modules loaded from them
  (:class:`~.cache.KernelCache`);
- :mod:`.launch`: buffers, padding, threads, and the backend's entry points
  (``integrate_fixed_compiled``, ``step_error_compiled``), the only module that loads
  numba.

The methods come from :data:`ensemble.methods.METHODS` as data (a tableau or a theta), so a
new method needs no code here.  The kernels must give the numbers of the numpy reference,
:mod:`ensemble.integrate.reference`, to round-off.
"""
