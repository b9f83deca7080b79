"""Text processing: transcript normalisation and verbalisation, lexicons and
pronunciation. Imports only pipeline.core."""
