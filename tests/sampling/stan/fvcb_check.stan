// Test program: evaluates leafcv's Stan FvCB functions at given points (run with the fixed_param sampler).
functions {
#include ../../../stan/fvcb_functions.stan
}
data {
  int<lower=1> N;
  vector[N] ci; vector[N] q; vector[N] tleaf; vector[N] o2;
  vector[N] vcmax25; vector[N] jmax25; vector[N] alpha; vector[N] theta; vector[N] rd25;
  real e1; real e2;
  vector[6] rubisco;                 // Kc25, Ko25, Gamma*25, Ha(Kc), Ha(Ko), Ha(Gamma*)
  matrix[3, 3] tresp;                // vcmax, jmax, rd: Ha, Hd, dS
  array[3] int peaked;
  real smooth_curvature;
}
generated quantities {
  vector[N] tk = tleaf + 273.15;
  vector[N] kc = rubisco[1] * fvcb_arrhenius(rubisco[4], tk);
  vector[N] ko = rubisco[2] * fvcb_arrhenius(rubisco[5], tk);
  vector[N] gstar = rubisco[3] * fvcb_arrhenius(rubisco[6], tk);
  vector[N] km = kc .* (1 + o2 ./ ko);
  vector[N] vcmax = vcmax25 .* fvcb_temperature(tresp[1], peaked[1], tk);
  vector[N] jmax = jmax25 .* fvcb_temperature(tresp[2], peaked[2], tk);
  vector[N] rd = rd25 .* fvcb_temperature(tresp[3], peaked[3], tk);
  vector[N] j = fvcb_electron_transport(alpha .* q, jmax, theta);
  vector[N] wc = vcmax .* fvcb_rubisco_factor(ci, gstar, kc, ko, o2);
  vector[N] wj = j .* fvcb_electron_factor(ci, gstar, e1, e2);
  vector[N] a_min = fmin(wc, wj) - rd;
  vector[N] a_smooth = fvcb_colimit(wc, wj, smooth_curvature) - rd;
}
