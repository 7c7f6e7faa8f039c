"""Kernels: pure functions over numpy arrays that rules and the engine share -- real tokens vs padding
(:mod:`.tokens`), label shift (:mod:`.shift`), documents (:mod:`.documents`), packing (:mod:`.packing`), content
hashes (:mod:`.hashing`), windows (:mod:`.windows`), MinHash (:mod:`.minhash`) and LSH (:mod:`.lsh`), spill files
(:mod:`.spill`), document text (:mod:`.text`) and token counting (:mod:`.tokenize`).  No rule and no engine inside."""
