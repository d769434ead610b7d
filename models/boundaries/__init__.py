"""The boundary model: timing evidence (silence, speaker changes, overlap) for utterance ends,
learned from corpora that carry word times and combined with the word tagger's own end score.

``_model`` holds its features and decision; ``_train`` fits it.
"""
