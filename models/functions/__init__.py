"""The utterance-function tagger: a CRF over a conversation's utterances that labels each one,
also while it is still growing.

``_views`` builds the one cleaned view of an utterance that training and serving share;
``_tagger`` holds its features and the tagger with its streaming paths; ``_train`` and ``_eval``
train and score it.
"""
