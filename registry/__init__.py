"""textsieve.registry: bundle format, tokenizer, scoring and the model registry."""
