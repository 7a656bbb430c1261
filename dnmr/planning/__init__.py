"""Planning before the experiment: timescale regimes, coalescence from the engine, experiment
plans and solvent liquid ranges.  Imports the model layer, dnmr.engine, dnmr.io and dnmr.activation."""
