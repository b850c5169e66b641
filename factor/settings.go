package factor

// WithDefaults returns the options with every zero field replaced by its
// documented default: the settings a run actually used.
func (o Options) WithDefaults() Options { return o.withDefaults() }

// WithDefaults returns the options with every zero field replaced by its
// documented default.
func (o MissingOptions) WithDefaults() MissingOptions { return o.withDefaults() }
