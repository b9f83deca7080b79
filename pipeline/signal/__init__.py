"""Signal processing on numpy arrays: decoding, container headers, voice activity,
segmentation, loudness and filters, blind SNR, fingerprints and bandwidth. Imports only pipeline.core."""
