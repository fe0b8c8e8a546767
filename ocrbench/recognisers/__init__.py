"""Recognisers: card parsing, preprocessing, CTC and autoregressive decoding."""
