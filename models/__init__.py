"""shiftsieve.models: pure computation (numpy in, numpy out)."""
