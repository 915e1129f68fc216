"""The golden kit: conformance records for one bundle, and a check of any host's outputs against them.

    stress.py   the built-in stress texts (Unicode traps, caps, empty texts) and texts from the bundle's vocabulary
    records.py  texts -> records (normalised text, tokens, ids, counts, float32 probs, label); JSONL read/write
    verify.py   a host's outputs vs the records: first differences with their stage, exit code

The JSONL format is specified in the README ("The golden kit"); `danpack golden` is the command.
"""
