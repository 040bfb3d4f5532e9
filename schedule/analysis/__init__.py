"""Analysis of the scheduled loop beyond frozen points.

- :mod:`.expression`: safe arithmetic expressions of the scheduling variables
  (basis functions named in a design file), with exact derivatives;
- :mod:`.basis`: the basis of a parameter-dependent Lyapunov matrix;
- :mod:`.lmi`: the rate-bounded LMIs, assembled for a conic solver and
  checked at any points;
- :mod:`.lpv_certificate`: certified scheduling rates and gain bounds (the
  cutting-plane loop, bisection, the family driver);
- :mod:`.witness`: parameter trajectories that show how far the certificate is
  from what a simulation of the loop observes;
- :mod:`.discrete_loop`: the sampled loop a discrete table runs in (zero-order
  hold of the plant, discrete stability, the bilinear image that carries the
  discrete norm and margins to the continuous routes);
- :mod:`.table_check`: the exported table checked as it runs (the table's
  multilinear lookup at every in-between point, discrete or continuous), side by
  side with the family's interpolant;
- :mod:`.family_rates`: the whole analysis for a controller family (its loop,
  its point sets), called by ``schedule check --rate-certificate``.

cvxpy and clarabel are imported only inside the functions that solve LMIs.
"""
