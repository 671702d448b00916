"""Operating characteristics of the verdict: simulated healthy and wrong runs, judged as
``diagnose --strict`` judges a run (default burn-in, default targets), over many seeds."""
