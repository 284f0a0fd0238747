-- holdings as given: the weights of each portfolio and asset class at the close of as_of,
-- held over the period that starts there. Rename and cast only.
with source as (
    select * from holdings
),

renamed as (
    select
        cast(portfolio_id as varchar) as portfolio_id,
        cast(as_of as date) as as_of,
        cast(asset_class as varchar) as asset_class,
        cast(weight as double) as weight
    from source
)

select * from renamed
