"""Results of stored nights: scoring with a rule or a model version (:mod:`.scoring`), and the
method-versus-reference comparisons and parameter export (:mod:`.reports`)."""
