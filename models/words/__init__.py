"""The word tagger: one CRF tag per word for its disfluency role and whether an utterance ends
after it.

``_tags`` names the CRF's internal tags and builds training sequences from annotated
conversations; ``_classes`` groups words into classes the features use; ``_features`` turns a
speaker's words into feature dictionaries; ``_model`` loads the shipped model; ``_decoder`` decodes
incrementally as words arrive; ``_train`` and ``_eval`` train and score it. The engine
(``models/_engine.py``) is its only caller at serving time.
"""
