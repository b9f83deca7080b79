"""Signal processing on numpy arrays: decoding, container headers, voice activity,
segmentation, loudness and filters, quality measures. Imports only pipeline.core."""
