"""The numbers of a report: states, statistics, reweighting, observables, the verdict."""
