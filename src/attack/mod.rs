//! Attacks (FGSM, PGD) that search for validated counterexamples: an upper bound on robust accuracy.
