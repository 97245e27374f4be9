"""Tables on disk and in memory: embedding tables (:mod:`.embeddings`), triplet tables
(:mod:`.triplets`) and pair lists (:mod:`.pairs`). Import the module you need; this package
imports nothing itself."""
