"""g2p-en's neural model run offline in numpy, and the cache of its predictions.

Importing ``g2p_en`` imports nltk and inflect (seconds) and calls ``nltk.download``
when NLTK's tagger and dictionary data are missing, as they are here. Only its neural
network is wanted, so :class:`NeuralModel` loads the package's own weights
(``checkpoint20.npz``) and runs the same GRU equations and greedy decoding as
``G2p.predict`` in numpy; the package itself is never imported. tests/test_g2p.py
checks the phones against ``G2p.predict`` word for word. :class:`PredictionCache` keeps
predictions across runs in a file named by :func:`neural_cache_name`.
"""

from __future__ import annotations

import functools
import importlib.util
from pathlib import Path
from typing import Any

from pipeline.core.cache import cache_key
from pipeline.core.errors import UsageError
from pipeline.core.fsio import sha256_file, write_text_atomic

__all__ = ["NEURAL_GRAPHEMES", "NEURAL_PHONEMES", "NeuralModel", "PredictionCache", "checkpoint_sha256",
           "g2p_en_dir", "neural_cache_name"]


def g2p_en_dir() -> Path:
    """The folder of the installed g2p-en package, found without importing it.

    ``importlib.util.find_spec`` on a top-level package locates it without running its
    ``__init__``, which is the code that would try to download.

    Returns
    -------
    Path
        The package folder, which holds ``checkpoint20.npz`` and ``homographs.en``.

    Raises
    ------
    UsageError
        When g2p-en is not installed (the english backend needs it).

    Examples
    --------
    >>> (g2p_en_dir() / "checkpoint20.npz").is_file()
    True
    """
    spec = importlib.util.find_spec("g2p_en")
    if spec is None or not spec.submodule_search_locations:
        raise UsageError("the english backend needs the g2p-en package: pip install g2p-en")
    return Path(next(iter(spec.submodule_search_locations)))


# The model's vocabularies, in the order of its checkpoint's embedding and output rows:
# g2p-en 2.1.0's G2p.graphemes and G2p.phonemes (tests/test_g2p.py checks them against
# the package).
NEURAL_GRAPHEMES = ("<pad>", "<unk>", "</s>", *"abcdefghijklmnopqrstuvwxyz")
NEURAL_PHONEMES = (
    "<pad>", "<unk>", "<s>", "</s>",
    "AA0", "AA1", "AA2", "AE0", "AE1", "AE2", "AH0", "AH1", "AH2", "AO0", "AO1", "AO2", "AW0", "AW1", "AW2",
    "AY0", "AY1", "AY2", "B", "CH", "D", "DH", "EH0", "EH1", "EH2", "ER0", "ER1", "ER2", "EY0", "EY1", "EY2",
    "F", "G", "HH", "IH0", "IH1", "IH2", "IY0", "IY1", "IY2", "JH", "K", "L", "M", "N", "NG", "OW0", "OW1",
    "OW2", "OY0", "OY1", "OY2", "P", "R", "S", "SH", "T", "TH", "UH0", "UH1", "UH2", "UW", "UW0", "UW1",
    "UW2", "V", "W", "Y", "Z", "ZH",
)
_MAX_PHONES = 20  # the decoder's step limit, as in G2p.predict
_START, _END = 2, 3  # "<s>" and "</s>" in NEURAL_PHONEMES


class NeuralModel:
    """g2p-en's sequence-to-sequence model (a GRU encoder-decoder over letters), offline.

    The weights are g2p-en's own ``checkpoint20.npz``; this class runs them with the
    same float32 GRU equations and greedy decoding as ``G2p.predict``, and
    tests/test_g2p.py checks the phones are the same word for word. Importing the
    ``g2p_en`` package instead would import nltk and inflect (about 4 s here, and
    nltk asks to download data), only to reach that one method.
    """

    def __init__(self) -> None:
        import numpy as np

        with np.load(g2p_en_dir() / "checkpoint20.npz") as weights:
            self._w = {name: weights[name] for name in weights.files}
        self._grapheme_index = {g: i for i, g in enumerate(NEURAL_GRAPHEMES)}

    @staticmethod
    def _gru_cell(x: Any, h: Any, w_ih: Any, w_hh: Any, b_ih: Any, b_hh: Any) -> Any:
        import numpy as np

        # np.einsum runs numpy's own loops; np.matmul would call BLAS, whose order of
        # summation follows its threads and CPU kernel, and a last-digit difference
        # can change which phone wins an argmax below.
        gates_x = np.einsum("bi,oi->bo", x, w_ih, optimize=False) + b_ih
        gates_h = np.einsum("bi,oi->bo", h, w_hh, optimize=False) + b_hh
        split = gates_x.shape[-1] * 2 // 3
        rz = 1 / (1 + np.exp(-(gates_x[:, :split] + gates_h[:, :split])))
        reset, update = np.split(rz, 2, -1)
        candidate = np.tanh(gates_x[:, split:] + reset * gates_h[:, split:])
        return (1 - update) * candidate + update * h

    def predict(self, word: str) -> tuple[str, ...]:
        """ARPAbet phones with stress digits for a lower-case word.

        Parameters
        ----------
        word : str
            Lower-case letters a-z; any other character reads as ``<unk>``.

        Returns
        -------
        tuple of str
            At most 20 phones, as ``G2p.predict`` gives them.

        Examples
        --------
        >>> NeuralModel().predict("taluko")
        ('T', 'AA0', 'L', 'UW1', 'K', 'OW0')
        """
        import numpy as np

        w = self._w
        unknown = self._grapheme_index["<unk>"]
        letters = [self._grapheme_index.get(ch, unknown) for ch in [*word, "</s>"]]
        embedded = np.take(w["enc_emb"], np.expand_dims(letters, 0), axis=0)
        h = np.zeros((1, w["enc_w_hh"].shape[-1]), np.float32)
        for t in range(len(letters)):
            h = self._gru_cell(embedded[:, t, :], h, w["enc_w_ih"], w["enc_w_hh"], w["enc_b_ih"], w["enc_b_hh"])
        step = np.take(w["dec_emb"], [_START], axis=0)
        phones: list[str] = []
        for _ in range(_MAX_PHONES):
            h = self._gru_cell(step, h, w["dec_w_ih"], w["dec_w_hh"], w["dec_b_ih"], w["dec_b_hh"])
            best = int((np.einsum("bi,oi->bo", h, w["fc_w"], optimize=False) + w["fc_b"]).argmax())
            if best == _END:
                break
            phones.append(NEURAL_PHONEMES[best] if best < len(NEURAL_PHONEMES) else "<unk>")
            step = np.take(w["dec_emb"], [best], axis=0)
        return tuple(phones)


@functools.cache
def checkpoint_sha256() -> str:
    """SHA-256 of g2p-en's ``checkpoint20.npz``, the weights :class:`NeuralModel` runs.

    It names the model in the text stage's metadata and keys the prediction cache, so
    neither depends on where this code lives. Read once per process.

    Returns
    -------
    str
        64 hexadecimal digits; empty when the package holds no checkpoint.

    Examples
    --------
    >>> len(checkpoint_sha256())
    64
    """
    checkpoint = g2p_en_dir() / "checkpoint20.npz"
    return sha256_file(checkpoint) if checkpoint.exists() else ""


def neural_cache_name(*, code_version: str) -> str:
    """File name of the prediction cache: a hash of the checkpoint and of ``code_version``.

    Parameters
    ----------
    code_version : str
        The code version of the stage that uses the cache (pipeline.core.codeversion:
        it covers this module, the g2p-en package's version and everything else that
        makes predictions).

    Returns
    -------
    str
        16 hexadecimal digits and ``.tsv``.

    Examples
    --------
    >>> name = neural_cache_name(code_version="example")
    >>> len(name), name.endswith(".tsv")
    (20, True)
    """
    return cache_key("g2p-en", code_version, checkpoint_sha256())[:16] + ".tsv"


class PredictionCache:
    """Predicted pronunciations kept in one TSV file (``word<TAB>phones``), across runs.

    A damaged line is skipped (that word is simply predicted again); the file is
    rewritten atomically by ``save`` when something was added.

    Parameters
    ----------
    path : Path or None
        The cache file (read when it exists); None keeps predictions in memory only.

    Examples
    --------
    >>> cache = PredictionCache(None)
    >>> cache.put("taluko", ("T", "AA0", "L", "UW1", "K", "OW0"))
    >>> cache.get("taluko"), cache.get("other")
    (('T', 'AA0', 'L', 'UW1', 'K', 'OW0'), None)
    """

    def __init__(self, path: Path | None) -> None:
        self.path = path
        self.entries: dict[str, tuple[str, ...]] = {}
        self._dirty = False
        if path is not None and path.exists():
            for line in path.read_text(encoding="utf-8", errors="replace").splitlines():
                word, tab, phones = line.partition("\t")
                if tab and word and phones.split():
                    self.entries[word] = tuple(phones.split())

    def get(self, word: str) -> tuple[str, ...] | None:
        return self.entries.get(word)

    def put(self, word: str, phones: tuple[str, ...]) -> None:
        self.entries[word] = phones
        self._dirty = True

    def save(self) -> None:
        if self.path is None or not self._dirty:
            return
        lines = [f"{w}\t{' '.join(p)}\n" for w, p in sorted(self.entries.items())]
        write_text_atomic(self.path, "".join(lines))
        self._dirty = False
