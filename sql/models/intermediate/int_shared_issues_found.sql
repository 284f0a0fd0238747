-- Whole-input problems: rows of the tables every portfolio shares (index_returns, riskfree),
-- empty portfolio ids, an undefined calendar and bad run options. The local engine stops
-- with exit code 2 on any of these; here each becomes an `error` row with an empty
-- portfolio_id, and the marts other than data_issues come out empty while any exists.
-- A value is finite when value - value = 0 (false for NaN and for +/-infinity).
with index_returns as (
    select * from stg_index_returns
),

riskfree as (
    select * from stg_riskfree
),

calendar as (
    select * from int_calendar_inferred
),

run_options as (
    select * from stg_run_options
),

holdings as (
    select * from stg_holdings
),

policy as (
    select * from stg_policy
),

segment_returns as (
    select * from stg_segment_returns
),

portfolio_returns as (
    select * from stg_portfolio_returns
),

index_missing_key as (
    select distinct
        period_end,
        asset_class,
        'missing_key' as code,
        'index_returns: a row with an empty period_end or asset_class.' as message
    from index_returns
    where period_end is null or asset_class is null
),

index_duplicate_key as (
    select
        period_end,
        asset_class,
        'duplicate_key' as code,
        'index_returns: duplicate key on ' || cast(period_end as varchar) || ' class '
        || asset_class || '; each (period_end, asset_class) must appear once.' as message
    from index_returns
    where period_end is not null and asset_class is not null
    group by period_end, asset_class
    having count(*) > 1
),

index_nonfinite as (
    select distinct
        period_end,
        asset_class,
        'nonfinite_value' as code,
        'index_returns: column ''return'' on '
        || coalesce(cast(period_end as varchar), 'an empty date') || ' class '
        || coalesce(asset_class, 'empty')
        || ' is empty, NaN or infinite; expected a finite number.' as message
    from index_returns
    where index_return is null or not index_return - index_return = 0
),

index_too_low as (
    select distinct
        period_end,
        asset_class,
        'return_below_minus_100' as code,
        'index_returns: column ''return'' on '
        || coalesce(cast(period_end as varchar), 'an empty date') || ' class '
        || coalesce(asset_class, 'empty')
        || ' is -100 % or less; expected a return above -1.' as message
    from index_returns
    where index_return <= -1
),

index_classes as (
    select distinct asset_class
    from index_returns
    where asset_class is not null
),

index_gaps as (
    select
        c.period_end,
        k.asset_class,
        'index_return_missing' as code,
        'index_returns: class ' || k.asset_class || ' has no return on '
        || cast(c.period_end as varchar) || '; every class needs every calendar date.' as message
    from calendar as c
    cross join index_classes as k
    left join index_returns as i
        on c.period_end = i.period_end and k.asset_class = i.asset_class
    where i.period_end is null
),

riskfree_missing_key as (
    select distinct
        cast(null as date) as period_end,
        cast(null as varchar) as asset_class,
        'missing_key' as code,
        'riskfree: a row with an empty period_end.' as message
    from riskfree
    where period_end is null
),

riskfree_duplicate_key as (
    select
        period_end,
        cast(null as varchar) as asset_class,
        'duplicate_key' as code,
        'riskfree: duplicate key on ' || cast(period_end as varchar)
        || '; each period_end must appear once.' as message
    from riskfree
    where period_end is not null
    group by period_end
    having count(*) > 1
),

riskfree_nonfinite as (
    select distinct
        period_end,
        cast(null as varchar) as asset_class,
        'nonfinite_value' as code,
        'riskfree: column ''return'' on ' || coalesce(cast(period_end as varchar), 'an empty date')
        || ' is empty, NaN or infinite; expected a finite number.' as message
    from riskfree
    where riskfree_return is null or not riskfree_return - riskfree_return = 0
),

riskfree_too_low as (
    select distinct
        period_end,
        cast(null as varchar) as asset_class,
        'return_below_minus_100' as code,
        'riskfree: column ''return'' on ' || coalesce(cast(period_end as varchar), 'an empty date')
        || ' is -100 % or less; expected a return above -1.' as message
    from riskfree
    where riskfree_return <= -1
),

riskfree_size as (
    select count(*) as n_rows
    from riskfree
),

riskfree_gaps as (
    -- an empty riskfree relation means "not given": only a given series must be complete
    select
        c.period_end,
        cast(null as varchar) as asset_class,
        'riskfree_return_missing' as code,
        'riskfree: no riskless return for the calendar period_end '
        || cast(c.period_end as varchar) || '.' as message
    from calendar as c
    cross join riskfree_size as s
    left join riskfree as r
        on c.period_end = r.period_end
    where s.n_rows > 0 and r.period_end is null
),

empty_portfolio_ids as (
    select distinct
        cast(null as date) as period_end,
        cast(null as varchar) as asset_class,
        'missing_key' as code,
        'holdings: column ''portfolio_id'' is empty in some rows; every row must name its '
        || 'portfolio.' as message
    from holdings
    where portfolio_id is null
    union all
    select distinct
        cast(null as date) as period_end,
        cast(null as varchar) as asset_class,
        'missing_key' as code,
        'policy: column ''portfolio_id'' is empty in some rows; every row must name its portfolio.'
        as message
    from policy
    where portfolio_id is null
    union all
    select distinct
        cast(null as date) as period_end,
        cast(null as varchar) as asset_class,
        'missing_key' as code,
        'segment_returns: column ''portfolio_id'' is empty in some rows; every row must name its '
        || 'portfolio.' as message
    from segment_returns
    where portfolio_id is null
    union all
    select distinct
        cast(null as date) as period_end,
        cast(null as varchar) as asset_class,
        'missing_key' as code,
        'portfolio_returns: column ''portfolio_id'' is empty in some rows; every row must name its '
        || 'portfolio.' as message
    from portfolio_returns
    where portfolio_id is null
),

table_sizes as (
    select
        (select count(*) from index_returns) as n_index_rows,
        (select count(*) from holdings) as n_holdings_rows,
        (select count(*) from run_options) as n_option_rows
),

calendar_frequency as (
    select
        max(frequency) as frequency,
        max(median_gap_days) as median_gap_days,
        count(*) as n_periods
    from calendar
),

empty_tables as (
    select
        cast(null as date) as period_end,
        cast(null as varchar) as asset_class,
        'calendar_undefined' as code,
        'index_returns: no rows; at least one period_end is needed to define the calendar.'
        as message
    from table_sizes
    where n_index_rows = 0
    union all
    select
        cast(null as date) as period_end,
        cast(null as varchar) as asset_class,
        'calendar_undefined' as code,
        'index_returns: cannot infer the calendar frequency from period_end (median gap '
        || cast(median_gap_days as varchar) || ' days); expected daily, weekly, monthly, '
        || 'quarterly, half-yearly or yearly dates.' as message
    from calendar_frequency
    where n_periods > 0 and frequency is null
    union all
    select
        cast(null as date) as period_end,
        cast(null as varchar) as asset_class,
        'empty_table' as code,
        'holdings: the table has no rows; expected at least one portfolio''s weights.' as message
    from table_sizes
    where n_holdings_rows = 0
),

bad_options as (
    select
        cast(null as date) as period_end,
        cast(null as varchar) as asset_class,
        'invalid_option' as code,
        'run_options: expected exactly one row; found ' || cast(n_option_rows as varchar) || '.'
        as message
    from table_sizes
    where n_option_rows <> 1
    union all
    select
        cast(null as date) as period_end,
        cast(null as varchar) as asset_class,
        'invalid_option' as code,
        'run_options: static_mode must be ''window'', ''expanding'' or ''trailing'' (with '
        || 'static_periods a positive integer).' as message
    from run_options
    where
        static_mode is null
        or static_mode not in ('window', 'expanding', 'trailing')
        or (static_mode = 'trailing' and (static_periods is null or static_periods < 1))
    union all
    select
        cast(null as date) as period_end,
        cast(null as varchar) as asset_class,
        'invalid_option' as code,
        'run_options: form must be ''bf'' or ''bhb''.' as message
    from run_options
    where form is null or form not in ('bf', 'bhb')
    union all
    select
        cast(null as date) as period_end,
        cast(null as varchar) as asset_class,
        'invalid_option' as code,
        'run_options: linking must be ''carino'', ''menchero'', ''grap'' or ''frongello''.'
        as message
    from run_options
    where linking is null or linking not in ('carino', 'menchero', 'grap', 'frongello')
    union all
    select
        cast(null as date) as period_end,
        cast(null as varchar) as asset_class,
        'invalid_option' as code,
        'run_options: weight_tolerance must be a number in (0, 1).' as message
    from run_options
    where weight_tolerance is null or not (weight_tolerance > 0 and weight_tolerance < 1)
),

found as (
    select period_end, asset_class, code, message from index_missing_key
    union all
    select period_end, asset_class, code, message from index_duplicate_key
    union all
    select period_end, asset_class, code, message from index_nonfinite
    union all
    select period_end, asset_class, code, message from index_too_low
    union all
    select period_end, asset_class, code, message from index_gaps
    union all
    select period_end, asset_class, code, message from riskfree_missing_key
    union all
    select period_end, asset_class, code, message from riskfree_duplicate_key
    union all
    select period_end, asset_class, code, message from riskfree_nonfinite
    union all
    select period_end, asset_class, code, message from riskfree_too_low
    union all
    select period_end, asset_class, code, message from riskfree_gaps
    union all
    select period_end, asset_class, code, message from empty_portfolio_ids
    union all
    select period_end, asset_class, code, message from empty_tables
    union all
    select period_end, asset_class, code, message from bad_options
),

shared_issues as (
    select
        cast(null as varchar) as portfolio_id,
        period_end,
        asset_class,
        'error' as severity,
        code,
        message
    from found
)

select * from shared_issues
