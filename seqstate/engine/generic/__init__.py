"""The generic kernel family: any model, predecessor and successor lists, dense emissions.

* :mod:`.kernels` -- the compiled steps (forward, backward, Viterbi) and the emission encoder;
* :mod:`.posterior` -- forward, backward and posterior passes over chunks of codes (the one
  implementation behind the whole-record and the streaming posterior);
* :mod:`.viterbi` -- the Viterbi passes (forward with checkpoints, block tracebacks);
* :mod:`.mea` -- the maximum-expected-accuracy passes (driven by :mod:`seqstate.engine.mea`);
* :mod:`.queries` -- segment queries: vectors at a position, constrained forward passes;
* :mod:`.backend` -- :class:`~.backend.GenericBackend`, the family's Python face (the
  specialised families derive from it).
"""
