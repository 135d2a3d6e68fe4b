"""Reference pieces of gradient-weighted relevance (Chefer, Gur & Wolf 2021,
"Generic Attention-model Explainability for Interpreting Bi-Modal and
Encoder-Decoder Transformers", ICCV; arXiv 2103.15679) that gen_cases.py and
the terminal UI's tests compute heed's answers against, in numpy."""

import numpy as np


def normbar(R):
    """Rbar = I + Rhat with the rows of Rhat = R - I scaled to sum 1 (rows of 0 stay 0)."""
    n = R.shape[0]
    Rh = R - np.eye(n)
    s = Rh.sum(-1, keepdims=True)
    Rh = np.where(s != 0, Rh / np.where(s != 0, s, 1), 0)
    return Rh + np.eye(n)
