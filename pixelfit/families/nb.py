"""nb: Bernoulli naive Bayes on the k pixels with the most mutual information with the label."""

from __future__ import annotations

import numpy as np

from pixelfit.errors import RuleFileError
from pixelfit.families._base import (
    Family,
    Model,
    SparseLinearInteger,
    array,
    bits,
    figures,
    flat_pixels,
    linear_explanation,
    powers_of_two_up_to,
    rc,
)


def log_odds(class_log_prior: np.ndarray, log_prob_on: np.ndarray) -> tuple[np.ndarray, float]:
    """Naive Bayes as a linear vote: (weight of each lit pixel, bias) of log P(pos|x) / P(neg|x).

    log_prob_on : ndarray of shape (2, k), log P(pixel lit | class), negative class first.
    """
    off = np.log(1 - np.exp(log_prob_on))  # as scikit-learn's BernoulliNB derives it
    weights = (log_prob_on[1] - off[1]) - (log_prob_on[0] - off[0])
    bias = float(class_log_prior[1] - class_log_prior[0] + off[1].sum() - off[0].sum())
    return weights, bias


class NaiveBayesFamily(Family):
    name = "nb"
    description = "Bernoulli naive Bayes on the k most informative pixels"
    size_name = "pixels"
    title_format = "Bernoulli naive Bayes on the most informative {n}"
    map_name = "log-odds weight of each lit pixel"
    sized_in_pixels = True

    def default_sizes(self, n_pixels):
        return powers_of_two_up_to(n_pixels)

    def make(self, size, n_pixels, seed):
        from sklearn.feature_selection import SelectKBest
        from sklearn.naive_bayes import BernoulliNB
        from sklearn.pipeline import Pipeline

        from pixelfit.models import pixel_mutual_information

        return Pipeline([("select", SelectKBest(pixel_mutual_information, k=min(size, n_pixels))),
                         # the pixels are bits already: no thresholding copy on every prediction
                         ("nb", BernoulliNB(alpha=1.0, binarize=None))])

    @staticmethod
    def _selected(est) -> np.ndarray:
        return np.flatnonzero(est.named_steps["select"].get_support())

    def size_figures(self, est, size, n_pixels):
        k = len(self._selected(est))
        return figures(2 * k + 1, vc_dim=k + 1)

    def section(self, est, shape):
        sel = self._selected(est)
        nb = est.named_steps["nb"]
        lp = nb.feature_log_prob_
        w_sel, bias = log_odds(nb.class_log_prior_, lp)
        weights = np.zeros(shape[0] * shape[1])
        weights[sel] = w_sel
        return {"pixels": [rc(i, shape[1]) for i in sel], "class_log_prior": [float(v) for v in nb.class_log_prior_],
                "log_prob_on": [[float(v) for v in row] for row in lp], "weights": weights.reshape(shape).tolist(),
                "bias": bias}

    def native_importance(self, est, X, y, shape):
        # The log-odds weight of a lit pixel.
        return np.asarray(self.section(est, shape)["weights"], np.float64)

    def decode(self, m, shape):
        pixels = flat_pixels(m["pixels"], shape, "model/pixels")
        k = len(pixels)
        prior = array(m["class_log_prior"], "model/class_log_prior", (2,))
        on = array(m["log_prob_on"], "model/log_prob_on", (2, k))
        if (on >= 0).any():
            raise RuleFileError("model/log_prob_on: log probabilities must be below 0")
        array(m["weights"], "model/weights", shape)
        return NaiveBayesModel(pixels, prior, on, shape[0] * shape[1])


class NaiveBayesModel(Model):
    def __init__(self, pixels, prior, on, n_pixels):
        self.pixels, self.prior, self.on, self.n_pixels = pixels, prior, on, n_pixels
        self.off = np.log(1 - np.exp(on))

    def decide(self, X):
        # The same arithmetic as scikit-learn's BernoulliNB joint log-likelihood.
        Xs = bits(X)[:, self.pixels].astype(np.float64)
        jll = Xs @ (self.on - self.off).T + (self.prior + self.off.sum(axis=1))
        top = jll.max(axis=1, keepdims=True)
        log_norm = top[:, 0] + np.log(np.exp(jll - top).sum(axis=1))
        return np.exp(jll[:, 1] - log_norm), jll[:, 1] > jll[:, 0]

    def pixels_used(self):
        return [int(i) for i in self.pixels]

    def explain(self, x, shape, threshold):
        w, b = log_odds(self.prior, self.on)
        return linear_explanation(self.pixels, w, b, x, shape, threshold)

    def integer(self, threshold=None):
        w, b = log_odds(self.prior, self.on)
        return SparseLinearInteger(self.pixels, w, b, threshold, self.n_pixels)
