// Hand-written reference program for ONE structure with a random slope, written directly from the
// equations and kept independent of leafcv's generic program (no shared functions, no index arrays).
// It checks the generic program in tests/sampling/stan/test_leafcv.py.
//
// Structure (species-specific nitrogen slopes of Vcmax25):
//   log Vcmax25[l] ~ normal(log_vcmax_ref + (b_n + u[sp[l]]) n[l], tau_v)        (centred leaf effects)
//   u[s] = tau_s z[s], z ~ std_normal()                  (non-centred: a few leaves per species)
//   logit alpha[l] ~ normal(logit_alpha_ref + b_chl chl[l] + b_sla sla[l], tau_a)  (centred leaf effects)
//   Jmax25 = jmax_ratio Vcmax25, Rd25 = rd_ratio Vcmax25, one theta for all leaves.
// Traits arrive centred and scaled.
//
// FvCB C3 model on a Ci basis (Farquhar, von Caemmerer & Berry 1980, Planta 149:78-90), textbook form:
//   Wc = Vcmax (Ci - G*) / (Ci + Kc (1 + O / Ko)),  Wj = J (Ci - G*) / (4 Ci + 8 G*),
//   theta J^2 - (alpha Q + Jmax) J + alpha Q Jmax = 0 (smaller root, textbook formula: fine at theta
//   near 0.7, loses digits only as theta -> 0, REFERENCES.md fact 2),  A = min(Wc, Wj) - Rd.
// Temperature: normalised Arrhenius exp(Ha (Tk - 298.15) / (298.15 R Tk)), Bernacchi et al. 2001
// (Plant Cell Environ 24:253-259, Table 1): Kc 404.9 umol/mol, Ha 79.43; Ko 278.4 mmol/mol, Ha 36.38;
// G* 42.75 umol/mol, Ha 37.83; Vcmax Ha 65.33; Rd Ha 46.39; Jmax Ha 43.54 (Bernacchi et al. 2003,
// Plant Cell Environ 26:1419-1430). Energies in kJ/mol, R = 8.314e-3 kJ/mol/K.
data {
  int<lower=1> N;
  int<lower=1> L;
  int<lower=2> G;                           // species
  array[N] int<lower=1, upper=L> leaf;
  vector[N] ci;
  vector<lower=0>[N] q;
  vector[N] tleaf;
  vector<lower=0>[N] o2;
  vector[N] a;
  vector[L] n;                              // centred, scaled traits
  vector[L] chl;
  vector[L] sla;
  array[L] int<lower=1, upper=G> sp;
  // priors, named (means and SDs on the link scale; theta: beta shapes on the natural scale)
  real vcmax_ref_mu;
  real<lower=0> vcmax_ref_sd;
  real jratio_mu;
  real<lower=0> jratio_sd;
  real alpha_ref_mu;
  real<lower=0> alpha_ref_sd;
  real<lower=0> theta_a;
  real<lower=0> theta_b;
  real rdratio_mu;
  real<lower=0> rdratio_sd;
  real<lower=0> slope_sd_log;
  real<lower=0> slope_sd_logit;
  real<lower=0> group_sd_scale;
  real<lower=0> leaf_sd_scale;
  real<lower=0> sigma_scale;
}
transformed data {
  vector[N] tk = tleaf + 273.15;
  vector[N] h = (tk - 298.15) ./ (298.15 * 8.314e-3 * tk);
  vector[N] gstar = 42.75 * exp(37.83 * h);
  vector[N] km = 404.9 * exp(79.43 * h) .* (1 + o2 ./ (278.4 * exp(36.38 * h)));
  vector[N] rubisco_ci = (ci - gstar) ./ (ci + km) .* exp(65.33 * h);     // Wc / Vcmax25
  vector[N] electron_ci = (ci - gstar) ./ (4 * ci + 8 * gstar);          // Wj / J
  vector[N] jmax_t = exp(43.54 * h);
  vector[N] rd_t = exp(46.39 * h);
}
parameters {
  real log_vcmax_ref;
  real log_jratio;
  real logit_alpha_ref;
  real logit_theta;
  real log_rdratio;
  real b_n;
  real<lower=0> tau_s;
  vector[G] z;
  real b_chl;
  real b_sla;
  real<lower=0> tau_v;
  real<lower=0> tau_a;
  vector[L] log_vcmax;
  vector[L] logit_alpha;
  real<lower=0> sigma;
}
model {
  real theta = inv_logit(logit_theta);
  vector[N] vcmax25 = exp(log_vcmax[leaf]);
  vector[N] aq = inv_logit(logit_alpha[leaf]) .* q;
  vector[N] jmax = exp(log_jratio) * vcmax25 .* jmax_t;
  vector[N] j = (aq + jmax - sqrt(square(aq + jmax) - 4 * theta * aq .* jmax)) / (2 * theta);
  vector[N] a_hat = fmin(vcmax25 .* rubisco_ci, j .* electron_ci) - exp(log_rdratio) * vcmax25 .* rd_t;

  log_vcmax ~ normal(log_vcmax_ref + (b_n + tau_s * z[sp]) .* n, tau_v);
  logit_alpha ~ normal(logit_alpha_ref + b_chl * chl + b_sla * sla, tau_a);
  a ~ normal(a_hat, sigma);

  log_vcmax_ref ~ normal(vcmax_ref_mu, vcmax_ref_sd);
  log_jratio ~ normal(jratio_mu, jratio_sd);
  logit_alpha_ref ~ normal(alpha_ref_mu, alpha_ref_sd);
  log_rdratio ~ normal(rdratio_mu, rdratio_sd);
  // beta prior on theta, with the Jacobian of theta = inv_logit(logit_theta)
  target += beta_lpdf(theta | theta_a, theta_b) + log(theta) + log1m(theta);
  b_n ~ normal(0, slope_sd_log);
  tau_s ~ normal(0, group_sd_scale);
  z ~ std_normal();
  b_chl ~ normal(0, slope_sd_logit);
  b_sla ~ normal(0, slope_sd_logit);
  tau_v ~ normal(0, leaf_sd_scale);
  tau_a ~ normal(0, leaf_sd_scale);
  sigma ~ normal(0, sigma_scale);
}
