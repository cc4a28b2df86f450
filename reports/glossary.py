"""The words of the report, in plain language for a finance reader: one list, printed in the report's
glossary section and copied verbatim in docs/glossary.md (a test keeps the two equal)."""

from __future__ import annotations

__all__ = ["GLOSSARY"]

#: term: plain-language meaning. Terms of the trade keep their usual names (common practice, no source).
GLOSSARY = {
    "lift": "How many more conversions the users who saw the ads made than they would have made without "
            "them, as a share: +10% means 110 conversions where 100 would have happened anyway.",
    "incremental conversions": "The conversions the ads added: the seen users' conversions minus those they "
                               "would have made without the ads.",
    "seen and unseen users": "Seen users had at least one viewable impression (an ad that was really on screen "
                             "long enough); unseen users were served the same campaign but never had a viewable "
                             "one. Comparing them is the core of the estimate.",
    "viewable impression": "An ad with at least 50% of its pixels on screen for at least 1 second (30% for "
                           "large display ads, 2 seconds for video), the industry's measurement rule.",
    "placebo outcome (negative control)": "A conversion the ads cannot cause, such as an action on an unrelated "
                                          "product. If seen users still do it more often, that difference is "
                                          "bias, not effect, and the model removes the same amount from the "
                                          "campaign's own result.",
    "bias correction": "The removal of the difference between seen and unseen users that the placebo outcomes "
                       "reveal (browsing habits and targeting that make seen users convert more anyway).",
    "credible interval": "A range that contains the true value with the stated probability (e.g. 90%), given "
                         "the model and its assumptions. Wider means less certain.",
    "partial pooling": "Each campaign's estimate is pulled towards the portfolio's typical value, the more so "
                       "the less data it has: small campaigns borrow strength from large ones.",
    "all campaigns (portfolio)": "The row of all campaigns together: total incremental conversions and the "
                                 "overall lift (named \"(portfolio)\" in the CSV and spreadsheet files).",
    "a new campaign (predictive)": "What a further campaign like these would most likely achieve, before it has "
                                   "any data (named \"(new campaign)\" in the CSV and spreadsheet files).",
    "log odds": "The model's own scale for effects (the logarithm of the odds ratio); small values are "
                "close to a relative change, e.g. 0.10 is about +10%.",
    "cost per incremental conversion": "Spend divided by incremental conversions: what each extra conversion "
                                       "cost. Not bounded when the ads may have added none.",
    "return on ad spend": "Incremental revenue divided by spend; above 1 the ads paid for themselves.",
    "R-hat": "A check that the model's independent sampling runs agree; values above 1.01 mean they disagree "
             "and the numbers are not yet reliable.",
    "effective sample size (ESS)": "How many independent draws the model's sampling is worth; below 400 the "
                                   "interval ends are not stable.",
    "divergences": "Places where the sampler could not follow the model accurately; any after tuning means "
                   "the results may be biased and the fit is marked as not converged.",
    "posterior predictive check": "Whether data simulated from the fitted model look like the observed data; "
                                  "far fewer groups inside their intervals than expected means a poor fit.",
    "cells": "Groups of users alike in how often they were served and other covariates; seen and unseen "
             "users are compared within each cell, so those differences do not count as effect.",
    "randomized test": "A holdout experiment: users are split at random into a group that may see the ads and a "
                       "control group that does not. It measures the lift without bias, but there are only a few.",
    "excess bias": "How far a target's own bias exceeds what its placebos show. Only randomized tests can "
                   "measure it; with them every campaign's estimate is corrected for it.",
    "tipping point": "The extra target-only bias (on the log-odds scale) at which a conclusion would flip, for "
                     "example at which the interval would reach zero. Large values mean a robust conclusion.",
    "E-value": "How strongly a hidden factor would have to be tied to both seeing the ads and converting (as a "
               "risk ratio) to explain the lower end of the lift away; 1 means no hidden factor is needed.",
}
