"""The patient bootstrap: replicates in shards, intervals (percentile, basic, m-out-of-n) and specification sweeps."""
