"""The compiled backend: numba kernels generated for one model and one method.

The modules, from the model to running a kernel:

- :mod:`.form`: the model as a kernel sees it: families of flow elements (one per group,
  one tree in the group index, :mod:`ensemble.model.grouped`) looped over groups, single
  elements written out, matrix products looped over their entries; the matrices'
  numbers and every pattern as data, so the text depends on the model's structure only;
- :mod:`.blocks`: members per block, the unit every kernel loops over;
- :mod:`.expressions`: straight-line scalar code of :mod:`ensemble.model.ir` trees;
- :mod:`.rates` and :mod:`.schedules`: the model's rates at a stage, in loops over groups
  with the members innermost, with the schedule values in force;
- :mod:`.explicit` (Butcher tableaux) and :mod:`.implicit` (theta methods, with
  :mod:`.newton_matrix` planning and filling the Newton matrix and :mod:`.sparsity` its
  factors' pattern): one step of a block of members;
- :mod:`.reports`: what is kept at each reported time (trajectories, or the step check's
  comparison);
- :mod:`.scalars`, :mod:`.reports` and :mod:`.block_lu`: plain functions the kernels
  run, the model-independent ones compiled once for all kernels by :mod:`.shared`;
- :mod:`.source`: the whole module text (:class:`~.source.KernelSource`);
- :mod:`.cache`: kernel files on disk and the modules loaded from them
  (:class:`~.cache.KernelCache`);
- :mod:`.launch`: buffers, padding, threads, and the backend's entry points
  (``integrate_fixed_compiled``, ``step_error_compiled``); with :mod:`.shared`, the only
  modules that load numba.

The methods come from :data:`ensemble.methods.METHODS` as data (a tableau or a theta), so a
new method needs no code here.  The kernels must give the numbers of the numpy reference,
:mod:`ensemble.integrate.reference`, to round-off.
"""
