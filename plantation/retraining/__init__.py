"""Growing the labels and the years: what to label next (``suggest``) and retraining on what was labelled (``retrain``)."""
