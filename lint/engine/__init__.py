"""The engine: infer each shard's facts (:mod:`.infer`), plan shards and parts (:mod:`.split`), scan one shard
through the rules and join parts and shards (:mod:`.scan`), run the work here, in a process pool or on a cluster
(:mod:`.executors`), sample (:mod:`.sampling`) and show progress (:mod:`.progress`).  It knows no particular rule:
rules come from :mod:`.registry`."""
