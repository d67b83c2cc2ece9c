"""faces layer of hiddenlens (private: the public names are in hiddenlens)."""
