//! Sound lower bounds on classification margins over a region: interval, linear relaxation, LP.
