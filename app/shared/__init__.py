"""What several stages share, below all of them: the rollout file contract, vector encoding,
the training-set definition with its consensus and label currency, and the labelling pace."""
