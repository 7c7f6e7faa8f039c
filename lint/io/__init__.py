"""Input: find the shards under the paths given (:mod:`.sources`), read each one as a stream of record batches with
bounded memory, and see list columns as flat numpy arrays (:mod:`.batch`)."""
