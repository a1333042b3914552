  // FvCB C3 photosynthesis functions, Ci basis (Farquhar, von Caemmerer & Berry 1980).
  // Included by leafcv.stan (cmdstanpy: #include; PyStan: inlined by leafcv.engines.program).
  // Units: rates umol m-2 s-1, Ci and Gamma* umol mol-1, Kc umol mol-1, Ko and O2 mmol mol-1,
  // activation and deactivation energies kJ mol-1, entropy kJ mol-1 K-1, temperatures K.

  // Normalised Arrhenius factor, 1 at 25 C (Bernacchi et al. 2001, Plant Cell Environ 24:253-259).
  vector fvcb_arrhenius(real ha, vector tk) {
    return exp(ha * (tk - 298.15) ./ (298.15 * 8.314e-3 * tk));
  }

  // Normalised peaked Arrhenius factor, 1 at 25 C (Medlyn et al. 2002, Plant Cell Environ 25:1167-1179).
  vector fvcb_peaked_arrhenius(real ha, real hd, real ds, vector tk) {
    real r = 8.314e-3;
    return fvcb_arrhenius(ha, tk) * (1 + exp((298.15 * ds - hd) / (298.15 * r)))
           ./ (1 + exp((tk * ds - hd) ./ (r * tk)));
  }

  // Temperature factor from a row (ha, hd, ds) and a flag: plain (0) or peaked (1).
  vector fvcb_temperature(row_vector resp, int peaked, vector tk) {
    if (peaked == 1) {
      return fvcb_peaked_arrhenius(resp[1], resp[2], resp[3], tk);
    }
    return fvcb_arrhenius(resp[1], tk);
  }

  // Potential electron transport rate: smaller root of theta J^2 - (aQ + Jmax) J + aQ Jmax = 0,
  // written as 2c / (b + sqrt(b^2 - 4 theta c)) so that it is exact at theta = 0 and stable near it;
  // the discriminant is clamped at 0 (theta = 1 gives min(aQ, Jmax)).
  vector fvcb_electron_transport(vector aq, vector jmax, vector theta) {
    vector[rows(aq)] b = aq + jmax;
    vector[rows(aq)] c = aq .* jmax;
    return 2 * c ./ (b + sqrt(fmax(square(b) - 4 * theta .* c, 0)));
  }

  // Ci factor of Rubisco-limited assimilation: Wc = Vcmax * (Ci - G*) / (Ci + Kc (1 + O/Ko)).
  vector fvcb_rubisco_factor(vector ci, vector gstar, vector kc, vector ko, vector o2) {
    return (ci - gstar) ./ (ci + kc .* (1 + o2 ./ ko));
  }

  // Ci factor of electron-transport-limited assimilation: Wj = J (Ci - G*) / (e1 Ci + e2 G*),
  // with (e1, e2) = (4, 8) or (4.5, 10.5).
  vector fvcb_electron_factor(vector ci, vector gstar, real e1, real e2) {
    return (ci - gstar) ./ (e1 * ci + e2 * gstar);
  }

  // Smooth co-limitation: smaller root of k A^2 - (w1 + w2) A + w1 w2 = 0 (0 < k <= 1),
  // computed without cancellation for either sign of w1 + w2.
  vector fvcb_colimit(vector w1, vector w2, real k) {
    int n = rows(w1);
    vector[n] s = w1 + w2;
    vector[n] root = sqrt(fmax(square(s) - 4 * k * (w1 .* w2), 0));
    vector[n] out;
    for (i in 1:n) {
      if (s[i] + root[i] == 0) {
        out[i] = 0;
      } else if (s[i] >= 0) {
        out[i] = 2 * w1[i] * w2[i] / (s[i] + root[i]);
      } else {
        out[i] = (s[i] - root[i]) / (2 * k);
      }
    }
    return out;
  }
