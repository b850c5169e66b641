package factor

// Informational reports whether a warning code describes an expected,
// documented limit of the chosen model or a routine clean-up (the mirror
// ambiguity of affine models, tracks left out because the model needs
// complete tracks, outlier tracks removed, a tracking option reduced to
// fit the frames, no uncertainties for a very long sequence) rather than a sign that the
// result may be wrong. Informational warnings do not lower a run's
// verdict; every other code, known or not, does.
func Informational(code string) bool {
	switch code {
	case WarnMirror, WarnIncompleteDropped, WarnOutliersRejected, "depth-order-by-convention", "tracking-option-changed", "uncertainty-not-computed":
		return true
	}
	return false
}
