"""The utterance-function tagger: a CRF over a conversation's utterances that labels each one,
also while it is still growing.

In the order of the data flow: ``_views`` builds the one cleaned view of an utterance that
training and serving share; ``_features`` describes a view given the one before it;
``_inference`` runs the CRF's recursions at the end of a chain (the compiled fast path, and
crfsuite as its reference); ``_tagger`` holds the public tagger, which maps features to model
rows, caches them and labels a growing utterance; ``_train`` and ``_eval`` train and score it.
"""
