"""The PyMC engines: the only sub-package that imports PyMC, PyTensor or ArviZ. Import it lazily
(inside functions) so that the command line and the exact engine start fast.

- :mod:`.engine`: the exact engine's model sampled with NUTS (robust, censored options);
- :mod:`.trend`: the drift model sampled with NUTS, the reference for the exact drift kernels;
- :mod:`.compiled`: built models and their compiled pieces kept for reuse with new data (the one
  store of the engine, the drift model, the per-analyte calibration, the study's Bayesian fit
  and the SBC test).
"""
