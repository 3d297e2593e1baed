// Package measure scores attribution maps against lesion and artefact masks
// and summarises the scores over a dataset.
//
// Per image and method ([Plan.Measure]):
//
//   - relevance mass inside the lesion, Σ A⁺·M / Σ A⁺, and relevance rank
//     accuracy, |top-K ∩ M| / K with K = |M| (Arras, Osman, Samek,
//     "CLEVR-XAI: A benchmark dataset for the ground truth evaluation of
//     neural network explanations", Information Fusion 2022);
//   - the pointing game (Zhang et al., "Top-down Neural Attention by
//     Excitation Backprop", ECCV 2016; IJCV 126(10) 2018): a hit when the
//     map's maximum lies on the lesion dilated by a tolerance;
//   - mass in a peri-lesional band, in the far background and on each
//     annotated artefact category;
//   - off-lesion hot regions: connected components of the top q % of
//     attribution outside the lesion and its band.
//
// Every measure is a [Value], which is either a number or undefined with a
// reason (empty mask, map without positive evidence, lesion outside the
// model's view). Undefined values are never NaN and never a silent zero;
// JSON encodes them as {"value": null, "reason": "..."}.
//
// Over a dataset ([Summarize]): mean and median inside-mass with 95 %
// percentile-bootstrap intervals (Efron & Tibshirani, "An Introduction to the
// Bootstrap", 1993), pointing accuracy and flagged rate with Wilson score
// intervals (Wilson, JASA 22:209–212, 1927), breakdowns by class,
// correctness and artefact, a worst-first list of flagged images, and
// acceptance criteria read from YAML ([ParseCriteria], [Evaluate]).
package measure
