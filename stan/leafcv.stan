// leafcv's generic hierarchical FvCB program. Every structure is data: design matrices, index arrays,
// sizes and flags built by leafcv.design. Adding a structure never needs a compile.
//
// Parameters are indexed p = 1 vcmax25, 2 jmax25, 3 alpha, 4 theta, 5 rd25, 6 tpu25 (when use_tpu).
// Each has a linear predictor on its link scale (log for rates, logit for alpha and theta):
//   eta[l, p] = b0[p] + X[l] * beta (columns mapped to p) + sum of group effects + leaf effect.
// jmax25 and rd25 may be tied to vcmax25: their predictor is then log(ratio to vcmax25).
// A leaf effect is written centred (the leaf's own eta is the parameter, eta ~ normal(mu, tau)) or
// non-centred (eta = mu + tau z), per (leaf, parameter) cell; group effects likewise per level.
// Points outside the training set are simply not passed in; their leaves' cells must be non-centred.
functions {
#include fvcb_functions.stan
}
data {
  int<lower=1> N;                          // points in the likelihood
  int<lower=1> L;                          // leaves (all leaves of the data set)
  array[N] int<lower=1, upper=L> leaf;     // leaf of each point
  vector[N] ci;                            // intercellular CO2, umol mol-1
  vector<lower=0>[N] q;                    // incident PPFD, umol m-2 s-1
  vector[N] tleaf;                         // leaf temperature, deg C
  vector<lower=0>[N] o2;                   // O2, mmol mol-1
  vector[N] a;                             // net assimilation, umol m-2 s-1
  int<lower=1> S;                          // residual SD groups (1, or one per curve type)
  array[N] int<lower=1, upper=S> sigma_group;

  // model options
  int<lower=0, upper=1> use_tpu;           // add Wp = 3 TPU to the limitations
  int<lower=0, upper=1> smooth;            // 0: hard minimum; 1: smooth co-limitation
  real<lower=0, upper=1> smooth_curvature; // curvature of the smooth co-limitation
  int<lower=0, upper=1> student_t;         // 0: normal likelihood; 1: Student-t with estimated df
  real<lower=0> e1;                        // electron requirement, Wj = J (Ci - G*) / (e1 Ci + e2 G*)
  real<lower=0> e2;
  vector[6] rubisco;                       // Kc25, Ko25, Gamma*25, Ha(Kc), Ha(Ko), Ha(Gamma*)
  matrix[4, 3] tresp;                      // rows vcmax, jmax, rd, tpu: Ha, Hd, dS
  array[4] int<lower=0, upper=1> peaked;   // peaked Arrhenius per row of tresp
  int<lower=0, upper=1> ratio_j;           // jmax25 = vcmax25 * exp(eta_jmax)
  int<lower=0, upper=1> ratio_rd;          // rd25 = vcmax25 * exp(eta_rd)

  // priors of the intercepts (parameter values at reference traits and reference levels)
  array[5 + use_tpu] int<lower=1, upper=2> prior_family;  // 1: normal on link scale (a, b = mean, sd)
  vector[5 + use_tpu] prior_a;                            // 2: beta(a, b) on the natural scale (logit links)
  vector<lower=0>[5 + use_tpu] prior_b;

  // fixed terms (leaf-level design matrix; each column belongs to one parameter)
  int<lower=0> K;
  matrix[L, K] X;
  matrix[K, 5 + use_tpu] fixed_map;        // 0/1: column k enters parameter p
  vector<lower=0>[K] beta_sd;              // normal(0, beta_sd) priors

  // random terms by groupings other than the leaf: R terms, Q levels stacked over terms
  int<lower=0> R;
  array[R] int<lower=1, upper=5 + use_tpu> re_par;
  array[R, L] int<lower=1> re_lev;         // stacked level index of each leaf, per term
  array[R] vector[L] re_x;                 // covariate multiplying the effect (1: intercept)
  vector<lower=0>[R] tau_sd;               // half-normal(0, tau_sd) priors on the SDs
  int<lower=0> Q;
  array[Q] int<lower=1, upper=R> lev_term;
  int<lower=0, upper=Q> Qc;
  array[Qc] int<lower=1, upper=Q> cen_lev; // centred levels
  array[Q - Qc] int<lower=1, upper=Q> nc_lev;
  // non-centred levels are u = tau .* (nc_rot * u_v), u_v ~ std_normal, nc_rot orthogonal. For a random
  // intercept whose levels are all non-centred, its block of nc_rot has first column 1 / sqrt(K) (the
  // mean of the K standard-normal z) and orthonormal contrasts after it, and the intercept is written
  // b0 = b0_free - b0_shift * (tau .* u_v): b0_free is then the mean of the level values, which the data
  // pin, and the mean of the z only meets its prior. An exact reparameterisation (Jacobian 1) that removes
  // the trade-off between an intercept and the mean of a few group effects. Identity and zero otherwise.
  matrix[Q - Qc, Q - Qc] nc_rot;
  matrix[5 + use_tpu, Q - Qc] b0_shift;

  // leaf effects: Rl terms (one per parameter with a leaf effect), cells flattened as l + (p - 1) L
  int<lower=0> Rl;
  vector<lower=0>[Rl] leaf_tau_sd;
  int<lower=0> Mc;
  array[Mc] int<lower=1> cen_cell;
  array[Mc] int<lower=1, upper=Rl> cen_term;
  int<lower=0> Mn;
  array[Mn] int<lower=1> nc_cell;
  array[Mn] int<lower=1, upper=Rl> nc_term;
  // correlated leaf effects (LKJ prior on their correlation): cells then come leaf by leaf, Rl
  // consecutive cells per leaf in term order, and every leaf is wholly centred or wholly non-centred
  int<lower=0, upper=1> leaf_corr;
  real<lower=0> lkj_eta;

  // smooth terms: a penalised spline of a parameter over a leaf covariate in mixed-model form (Eilers &
  // Marx 1996; the linear part is a column of X). Rs terms, Ms basis columns stacked over terms: the
  // term's deviation from its linear trend is Zs[, m] * tau_s[term] * z_s[m] summed over its columns
  int<lower=0> Rs;
  array[Rs] int<lower=1, upper=5 + use_tpu> sm_par;
  int<lower=0> Ms;
  matrix[L, Ms] Zs;
  array[Ms] int<lower=1, upper=Rs> sm_term;
  vector<lower=0>[Rs] sm_tau_sd;           // half-normal(0, sm_tau_sd) priors on the smooth SDs

  real<lower=0> sigma_sd;                  // half-normal(0, sigma_sd) on residual SDs
  real<lower=0> nu_shape;                  // gamma(nu_shape, nu_rate) on Student-t df
  real<lower=0> nu_rate;

  // scaling of the free parameters: each block is sampled as offset + scale * (a standardised value), an
  // exact reparameterisation (Stan's offset/multiplier) that hands the sampler a posterior already close to
  // unit scale, so a refit started from the full-data fit needs only a short warm-up. Blocks stacked in
  // the order b0_free, beta, log_tau, u_c, u_v, log_tau_leaf, eta_c, eta_z, log_tau_s, z_s, log_sigma; n_scale = 0 means
  // offset 0 and scale 1 everywhere (the plain program).
  int<lower=0> n_scale;
  vector[n_scale] scale_offset;
  vector<lower=0>[n_scale] scale_mult;
}
transformed data {
  int P = 5 + use_tpu;
  int n_free = P + K + R + Q + Rl + Mc + Mn + S + Rs + Ms;
  vector[n_free] off = n_scale == 0 ? rep_vector(0, n_free) : scale_offset;
  vector[n_free] mul = n_scale == 0 ? rep_vector(1, n_free) : scale_mult;
  // log_tau_s and z_s are stacked before log_sigma (never empty), so that an empty block's slice stays
  // within the vector; they are declared last, so a structure without them keeps its parameter order
  array[12] int at = {0, P, P + K, P + K + R, P + K + R + Qc, P + K + R + Q, P + K + R + Q + Rl,
                      P + K + R + Q + Rl + Mc, P + K + R + Q + Rl + Mc + Mn, P + K + R + Q + Rl + Mc + Mn + Rs,
                      P + K + R + Q + Rl + Mc + Mn + Rs + Ms, n_free};
  matrix[Ms, P] sm_map = rep_matrix(0, Ms, P);   // 0/1: basis column m enters parameter p
  for (m in 1:Ms) {
    sm_map[m, sm_par[sm_term[m]]] = 1;
  }
  vector[N] tk = tleaf + 273.15;
  vector[N] kc = rubisco[1] * fvcb_arrhenius(rubisco[4], tk);
  vector[N] ko = rubisco[2] * fvcb_arrhenius(rubisco[5], tk);
  vector[N] gstar = rubisco[3] * fvcb_arrhenius(rubisco[6], tk);
  vector[N] fc = fvcb_rubisco_factor(ci, gstar, kc, ko, o2);
  vector[N] fe = fvcb_electron_factor(ci, gstar, e1, e2);
  vector[N] fv = fvcb_temperature(tresp[1], peaked[1], tk);
  vector[N] fj = fvcb_temperature(tresp[2], peaked[2], tk);
  vector[N] fr = fvcb_temperature(tresp[3], peaked[3], tk);
  vector[N] ft = fvcb_temperature(tresp[4], peaked[4], tk);
  if (n_scale != 0 && n_scale != n_free) {
    reject("scale_offset has ", n_scale, " entries; the free parameters number ", n_free);
  }
  if (n_scale != 0 && min(scale_mult) <= 0) {
    reject("every scale_mult must be positive");
  }
}
parameters {
  vector<offset=off[(at[1] + 1):at[2]], multiplier=mul[(at[1] + 1):at[2]]>[P] b0_free;
  vector<offset=off[(at[2] + 1):at[3]], multiplier=mul[(at[2] + 1):at[3]]>[K] beta;
  vector<offset=off[(at[3] + 1):at[4]], multiplier=mul[(at[3] + 1):at[4]]>[R] log_tau;
  vector<offset=off[(at[4] + 1):at[5]], multiplier=mul[(at[4] + 1):at[5]]>[Qc] u_c;
  vector<offset=off[(at[5] + 1):at[6]], multiplier=mul[(at[5] + 1):at[6]]>[Q - Qc] u_v;
  vector<offset=off[(at[6] + 1):at[7]], multiplier=mul[(at[6] + 1):at[7]]>[Rl] log_tau_leaf;
  vector<offset=off[(at[7] + 1):at[8]], multiplier=mul[(at[7] + 1):at[8]]>[Mc] eta_c;
  vector<offset=off[(at[8] + 1):at[9]], multiplier=mul[(at[8] + 1):at[9]]>[Mn] eta_z;
  vector<offset=off[(at[11] + 1):at[12]], multiplier=mul[(at[11] + 1):at[12]]>[S] log_sigma;
  vector<offset=off[(at[9] + 1):at[10]], multiplier=mul[(at[9] + 1):at[10]]>[Rs] log_tau_s;
  vector<offset=off[(at[10] + 1):at[11]], multiplier=mul[(at[10] + 1):at[11]]>[Ms] z_s;
  array[student_t] real<lower=1> nu;
  array[leaf_corr] cholesky_factor_corr[Rl] leaf_chol;
}
transformed parameters {
  // the SDs are sampled on the log scale (the Jacobian is added in the model block), as Stan does for
  // <lower=0>, so that they too can be offset and scaled
  vector<lower=0>[R] tau = exp(log_tau);
  vector<lower=0>[Rl] tau_leaf = exp(log_tau_leaf);
  vector<lower=0>[S] sigma = exp(log_sigma);
  vector<lower=0>[Rs] tau_s = exp(log_tau_s);
  vector[Q - Qc] u_z = nc_rot * u_v;
  vector[P] b0 = b0_free - b0_shift * (tau[lev_term[nc_lev]] .* u_v);
}
model {
  vector[Q] u;
  matrix[L, P] mu = rep_matrix(b0', L);
  vector[L * P] mu_flat;
  vector[L * P] eta;
  u[cen_lev] = u_c;
  u[nc_lev] = tau[lev_term[nc_lev]] .* u_z;
  if (K > 0) {
    mu += X * diag_pre_multiply(beta, fixed_map);
  }
  for (r in 1:R) {
    mu[:, re_par[r]] += u[re_lev[r]] .* re_x[r];
  }
  if (Ms > 0) {
    mu += Zs * diag_pre_multiply(tau_s[sm_term] .* z_s, sm_map);
  }
  mu_flat = to_vector(mu);
  eta = mu_flat;
  eta[cen_cell] = eta_c;
  if (leaf_corr == 1) {
    matrix[Rl, Rl] chol = diag_pre_multiply(tau_leaf, leaf_chol[1]);
    eta[nc_cell] = mu_flat[nc_cell] + to_vector(chol * to_matrix(eta_z, Rl, Mn %/% Rl));
    // centred leaves: multi_normal_cholesky(mu, chol) per leaf, written out and vectorised
    target += -0.5 * dot_self(to_vector(mdivide_left_tri_low(chol, to_matrix(eta_c - mu_flat[cen_cell], Rl, Mc %/% Rl))))
              - (Mc %/% Rl) * sum(log(diagonal(chol)));
    leaf_chol[1] ~ lkj_corr_cholesky(lkj_eta);
  } else {
    eta[nc_cell] = mu_flat[nc_cell] + tau_leaf[nc_term] .* eta_z;
    eta_c ~ normal(mu_flat[cen_cell], tau_leaf[cen_term]);
  }

  {
    vector[L] lv = eta[1:L];
    vector[L] vc25 = exp(lv);
    vector[L] jm25 = exp(eta[(L + 1):(2 * L)] + ratio_j * lv);
    vector[L] alpha = inv_logit(eta[(2 * L + 1):(3 * L)]);
    vector[L] theta = inv_logit(eta[(3 * L + 1):(4 * L)]);
    vector[L] rd25 = exp(eta[(4 * L + 1):(5 * L)] + ratio_rd * lv);
    vector[N] j = fvcb_electron_transport(alpha[leaf] .* q, jm25[leaf] .* fj, theta[leaf]);
    vector[N] wc = vc25[leaf] .* fv .* fc;
    vector[N] wj = j .* fe;
    vector[N] gross;
    vector[N] mu_a;
    if (smooth == 1) {
      gross = fvcb_colimit(wc, wj, smooth_curvature);
    } else {
      gross = fmin(wc, wj);
    }
    if (use_tpu == 1) {
      vector[L] tpu25 = exp(eta[(5 * L + 1):(6 * L)]);
      vector[N] wp = 3 * tpu25[leaf] .* ft;
      gross = smooth == 1 ? fvcb_colimit(gross, wp, smooth_curvature) : fmin(gross, wp);
    }
    mu_a = gross - rd25[leaf] .* fr;
    if (student_t == 1) {
      if (S == 1) {
        a ~ student_t(nu[1], mu_a, sigma[1]);
      } else {
        a ~ student_t(nu[1], mu_a, sigma[sigma_group]);
      }
    } else {
      if (S == 1) {
        a ~ normal(mu_a, sigma[1]);
      } else {
        a ~ normal(mu_a, sigma[sigma_group]);
      }
    }
  }

  for (p in 1:P) {
    if (prior_family[p] == 1) {
      b0[p] ~ normal(prior_a[p], prior_b[p]);
    } else {
      // beta prior on inv_logit(b0), with the Jacobian of the logit transform
      target += beta_lpdf(inv_logit(b0[p]) | prior_a[p], prior_b[p])
                + log_inv_logit(b0[p]) + log1m_inv_logit(b0[p]);
    }
  }
  target += sum(log_tau) + sum(log_tau_leaf) + sum(log_sigma) + sum(log_tau_s);   // Jacobians of the exp transforms
  beta ~ normal(0, beta_sd);
  tau ~ normal(0, tau_sd);
  u_c ~ normal(0, tau[lev_term[cen_lev]]);
  u_v ~ std_normal();
  tau_leaf ~ normal(0, leaf_tau_sd);
  eta_z ~ std_normal();
  sigma ~ normal(0, sigma_sd);
  nu ~ gamma(nu_shape, nu_rate);
  tau_s ~ normal(0, sm_tau_sd);
  z_s ~ std_normal();
}
