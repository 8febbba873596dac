"""From normalized inputs to the record: result assembly, profiles, canonical hashing, reproduction."""
