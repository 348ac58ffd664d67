"""The goal-conditioned dataset: format, writer, reader, sampler and verification."""
