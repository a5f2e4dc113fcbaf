"""The stages of a filterbank fit, one module each; ``search.optimize.FilterbankSearch`` runs them.

- ``evaluate``: scoring filterbanks on fixed chunks of shared windows (the joblib pool, window
  sharing, the chunk tasks, the per-row statistics the refinement reuses)
- ``space``: the channel grid and the bounds of the parameters (``SearchSpace``)
- ``state``: the resumable state, typed (``SearchState``), and its checkpoint layout and version
- ``context``: one run's settings, windows, state, progress and checkpoints
- ``baselines``: stage 0, the best spectrogram and scalogram
- ``family``: stage 1, the family search (scikit-optimize)
- ``refine``: stage 2, per-channel coordinate sweeps by bounded Brent
- ``judge``: stage 3, the judgement on the held-out windows and the diagnostics record

Units: Hz, s, Hz/s, s·Hz for cell areas; windows ``(M, N)``, images ``(M, C, N)``.
"""
