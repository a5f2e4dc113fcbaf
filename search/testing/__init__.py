"""Support for the tests, the benchmarks and the reliability campaign (as numpy.testing is for
numpy's): naive references (:mod:`.reference`) and generated sites with known answers
(:mod:`.sites`). Nothing in the engine imports it."""
