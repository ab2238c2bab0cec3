"""A study in; traces out: campaigns replayed on every replicate, chunked, in parallel, into a results folder."""
