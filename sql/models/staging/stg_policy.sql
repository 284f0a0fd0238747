-- policy as given: the strategic mix, a row set per portfolio and effective_from date that
-- applies to every period starting on or after that date, until the next set. Rename and
-- cast only.
with source as (
    select * from policy
),

renamed as (
    select
        cast(portfolio_id as varchar) as portfolio_id,
        cast(asset_class as varchar) as asset_class,
        cast(weight as double) as policy_weight,
        cast(effective_from as date) as effective_from
    from source
)

select * from renamed
